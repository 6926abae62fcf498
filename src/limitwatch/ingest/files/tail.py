"""Tailing CSV and JSON-lines files that controllers and historians export.

A file is known by its identity (device and inode), not its name, so a rotated file (renamed,
with a new one created under the old name) is finished from where we stopped and the new one is
read from its start. A file that shrinks below our offset was truncated in place and is read
again from its start. Only complete lines (ending in a newline) are read: a partial last line
waits for the writer to finish it.

Only files inside the glob's folder are read. A symlink (or a symlinked subfolder) that leads
out of it is refused with one warning per path: whoever can write to an export folder must not
be able to have the service -- which may run with more rights -- copy another file's content
into readings and dead letters. The check is made on the resolved path when the file is listed
and again on the open descriptor (same device and inode), so swapping a link in between does
not help.

The caller commits the byte offset of the last line it used in the same transaction as the
state that line produced; after a crash, reading resumes at exactly the next line.
"""

from __future__ import annotations

import csv
import glob
import json
import logging
import os
import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from stat import S_ISREG
from typing import Any, Literal

log = logging.getLogger("limitwatch.files")

MAX_READ = 4 * 1024 * 1024
"""Bytes read per file per poll; the rest waits for the next poll, keeping batches bounded.
It is also the longest line read as a row: a longer one is passed on as a ``line-too-long``
dead letter and reading goes on after it (waiting for its end would stop the file for good)."""

KEPT_PREFIX = 1024
"""Bytes of an overlong line kept in its dead letter: enough to see what it was."""

_SCAN = 1024 * 1024
"""Bytes read at a time while looking for the end of an overlong line."""


@dataclass(frozen=True, slots=True)
class FileLine:
    source: str
    path: str
    file_id: str
    end_offset: int
    """Byte offset just after this line: the offset to commit once it is used."""
    record: dict[str, Any] | None
    """The parsed row (CSV row as a dict by header, or a JSON object). None with no ``error``
    for a line that only moves the offset on (a CSV header, a blank line)."""
    raw: bytes
    error: str | None = None
    """Why a line could not be read as a row; it becomes a dead letter."""
    reason: str = "unreadable-line"
    """The dead letter's reason code when there is an ``error``."""
    start: int | None = None
    """Byte offset where the line starts, given when ``raw`` is only the start of the line."""
    line: int = 0
    """The line's number as a text editor counts it (1 is the first line, a CSV header), so a
    dead letter can say where to look; 0 when not known."""


def file_identity(stat: os.stat_result) -> str:
    return f"{stat.st_dev}:{stat.st_ino}"


_MAGIC = re.compile(r"[*?[]")


def glob_folder(pattern: str) -> str:
    """The folder a glob cannot leave: its leading path components before the first wildcard.

    >>> glob_folder("/data/export/*.csv"), glob_folder("/data/*/line.csv"), glob_folder("/d/a.csv")
    ('/data/export', '/data', '/d')
    """
    parts = os.path.normpath(os.path.expanduser(pattern)).split(os.sep)
    fixed: list[str] = []
    for part in parts[:-1]:  # the last component names files, never the folder
        if _MAGIC.search(part):
            break
        fixed.append(part)
    folder = os.sep.join(fixed)
    if not folder:
        return os.sep if pattern.startswith(os.sep) else os.curdir
    return folder


class FileTail:
    """Finds new complete lines in the files matching a glob."""

    def __init__(
        self,
        name: str,
        pattern: str,
        fmt: Literal["csv", "jsonl"],
        start_at: Literal["beginning", "end"] = "beginning",
        columns: Mapping[str, str | None] | None = None,
    ) -> None:
        self.name = name
        self.pattern = pattern
        self.format = fmt
        self.start_at = start_at
        self.columns = {k: v for k, v in (columns or {}).items() if v is not None}
        """Config key -> the CSV column it names: a header without one of them is warned
        about once per file, since every line of that file would become a dead letter."""
        self._first_poll = True
        self._refused: set[str] = set()
        self._lines: dict[str, tuple[int, int]] = {}
        """File identity -> (byte offset, number of the line that starts there), so the line
        count after the first read of a file costs nothing."""
        self._header_checked: set[str] = set()

    def poll(self, offsets: dict[str, int]) -> Iterator[FileLine]:
        """Yield new complete lines of every matching file, oldest file first.

        ``offsets`` maps file identity to the committed byte offset; it is read, never written
        here (the caller updates it after committing).
        """
        first = self._first_poll
        self._first_poll = False
        paths = sorted(glob.glob(self.pattern), key=_mtime_then_name)
        folder = os.path.realpath(glob_folder(self.pattern))
        for path in paths:
            real = os.path.realpath(path)
            if self._outside(path, real, folder):
                continue
            try:  # the resolved path, not following a link swapped in since
                stat = os.stat(real, follow_symlinks=False)
            except FileNotFoundError:
                continue
            if not S_ISREG(stat.st_mode):
                continue
            ident = file_identity(stat)
            offset = offsets.get(ident)
            if offset is None and first and self.start_at == "end":
                offsets[ident] = stat.st_size  # caller persists with the next commit
                continue
            offset = offset or 0
            if stat.st_size < offset:
                log.warning(
                    "file %s shrank from %d to %d bytes: truncated in place, reading it again "
                    "from the start",
                    path,
                    offset,
                    stat.st_size,
                )
                offset = 0
            if stat.st_size == offset:
                continue
            yield from self._read(path, ident, offset)

    def _outside(self, path: str, real: str, folder: str) -> bool:
        """True (with one warning per path) when ``path`` resolves outside ``folder``."""
        if os.path.commonpath([folder, real]) == folder:
            self._refused.discard(path)
            return False
        if path not in self._refused:
            self._refused.add(path)
            log.warning(
                "file source %r: %s resolves to %s, outside the folder %s of its glob; "
                "it is not read",
                self.name,
                path,
                real,
                folder,
            )
        return True

    def _open(self, path: str, ident: str) -> Any:
        """Open ``path`` only if it still is the file listed and checked as ``ident``."""
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC)
        try:
            if file_identity(os.fstat(fd)) != ident:
                raise OSError(f"{path} changed between listing and opening")
            return os.fdopen(fd, "rb")
        except BaseException:
            os.close(fd)
            raise

    def _read(self, path: str, ident: str, offset: int) -> Iterator[FileLine]:
        while True:
            overlong_end: int | None = None
            try:
                with self._open(path, ident) as handle:
                    header = self._header(handle) if self.format == "csv" else None
                    if header is not None:
                        self._check_header(path, ident, header)
                    if header is not None and offset == 0:
                        offset = handle.tell()
                        self._lines[ident] = (offset, 2)
                        yield FileLine(self.name, path, ident, offset, None, b"", line=1)
                    number = self._line_number(handle, ident, offset)
                    handle.seek(offset)
                    data = handle.read(MAX_READ)
                    if len(data) == MAX_READ and b"\n" not in data:
                        overlong_end = _end_of_line(handle)
                        if overlong_end is None:
                            return  # its newline is not written yet: look again next poll
            except OSError as exc:
                log.warning("file %s could not be read: %s", path, exc)
                return
            if overlong_end is None:
                break
            log.warning(
                "file %s: line %d (at byte %d) is %d bytes long, over the limit of %d; "
                "it goes to the dead letters and reading goes on after it",
                path,
                number,
                offset,
                overlong_end - offset,
                MAX_READ,
            )
            yield FileLine(
                self.name,
                path,
                ident,
                overlong_end,
                None,
                data[:KEPT_PREFIX],
                f"the line is {overlong_end - offset} bytes long, over the limit of {MAX_READ} "
                f"bytes (the dead letter keeps its first {KEPT_PREFIX})",
                "line-too-long",
                offset,
                line=number,
            )
            offset = overlong_end
            self._lines[ident] = (offset, number + 1)
        end = data.rfind(b"\n")
        if end < 0:
            return  # a partial line: wait for its newline
        position = offset
        for raw in data[: end + 1].splitlines(keepends=True):
            position += len(raw)
            text = raw.strip()
            if not text:
                yield FileLine(self.name, path, ident, position, None, raw, line=number)
            else:
                record, error = self._parse(text, header)
                yield FileLine(self.name, path, ident, position, record, raw, error, line=number)
            number += raw.count(b"\n")
            self._lines[ident] = (position, number)

    def _line_number(self, handle: Any, ident: str, offset: int) -> int:
        """The number of the line starting at ``offset``: remembered from the last read, or
        counted once (after a restart, or a file rotated under us)."""
        known = self._lines.get(ident)
        if known is not None and known[0] == offset:
            return known[1]
        handle.seek(0)
        newlines, left = 0, offset
        while left > 0:
            chunk = handle.read(min(left, 1 << 20))
            if not chunk:
                break
            newlines += chunk.count(b"\n")
            left -= len(chunk)
        self._lines[ident] = (offset, newlines + 1)
        return newlines + 1

    def _check_header(self, path: str, ident: str, header: list[str]) -> None:
        if ident in self._header_checked:
            return
        self._header_checked.add(ident)
        missing = {key: col for key, col in self.columns.items() if col not in header}
        if missing:
            named = ", ".join(f"{key} = {col!r}" for key, col in missing.items())
            log.warning(
                "source %s: file %s has no column for %s (its header has: %s); every line of "
                "it will become a dead letter (missing-field) until the file or the config "
                "is corrected",
                self.name,
                path,
                named,
                ", ".join(header),
            )

    def _header(self, handle: Any) -> list[str] | None:
        first = handle.readline(MAX_READ)
        if not first.endswith(b"\n"):
            return None
        try:
            return [h.strip() for h in next(csv.reader([first.decode("utf-8-sig")]))]
        except (UnicodeDecodeError, StopIteration, csv.Error):
            return None

    def _parse(self, text: bytes, header: list[str] | None) -> tuple[dict | None, str | None]:
        try:
            line = text.decode("utf-8")
        except UnicodeDecodeError:
            return None, "not UTF-8 text"
        if self.format == "jsonl":
            try:
                record = json.loads(line)
            except json.JSONDecodeError as exc:
                return None, f"not JSON: {exc.msg}"
            except ValueError as exc:  # a number past the interpreter's 4,300-digit limit
                return None, f"not JSON that can be read: {exc}"
            except RecursionError:
                return None, "not JSON that can be read: arrays or objects nest too deeply"
            if not isinstance(record, dict):
                return None, "a JSON line must be an object"
            return record, None
        if header is None:
            return None, "the file has no complete header line"
        try:
            cells = next(csv.reader([line]))
        except (csv.Error, StopIteration) as exc:
            return None, f"not CSV: {exc}"
        if len(cells) != len(header):
            return None, f"expected {len(header)} columns, found {len(cells)}"
        return dict(zip(header, (c.strip() for c in cells), strict=True)), None


def _end_of_line(handle: Any) -> int | None:
    """Offset just after the next newline from the handle's position, or None before one."""
    while True:
        chunk = handle.read(_SCAN)
        if not chunk:
            return None
        found = chunk.find(b"\n")
        if found >= 0:
            return int(handle.tell() - len(chunk) + found + 1)


def _mtime_then_name(path: str) -> tuple[float, str]:
    try:
        return (os.stat(path).st_mtime, path)
    except OSError:
        return (0.0, path)
