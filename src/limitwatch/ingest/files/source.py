"""The file source as the service runs it: polled, each line a row, offsets committed.

The worker polls on ``poll_every``; the lines come from :class:`~limitwatch.ingest.files.tail.
FileTail` in file order, each row is parsed by :class:`~limitwatch.ingest.rows.RowParser`,
and the byte offset after the last line of a batch is committed in the batch's transaction
(:meth:`FileSource.positions`). Only after that commit does the source take the offsets as its
own (:meth:`FileSource.acknowledge`), so a crash resumes at exactly the next line. Dead letters
say where the line was: the file and the line number as an editor counts it.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import Self

from limitwatch.ingest.base import Parsed, Source, SourceContext
from limitwatch.ingest.files.settings import FileSourceConfig
from limitwatch.ingest.files.tail import FileLine, FileTail
from limitwatch.ingest.reasons import PayloadError
from limitwatch.ingest.rows import RowParser

__all__ = ["FileSource"]


class FileSource(Source):
    """``type = "file"``: CSV or JSON-lines files matching a glob."""

    Settings = FileSourceConfig
    poll_job = "poll-files"

    def __init__(
        self,
        settings: FileSourceConfig,
        tail: FileTail,
        parser: RowParser,
        committed: dict[str, int],
    ) -> None:
        super().__init__(settings)
        self.poll_every = settings.poll_every
        self.tail = tail
        self.parser = parser
        self.committed = committed
        """File identity -> byte offset, as last committed."""
        self._before: dict[str, int] = {}
        self._pending: dict[str, int] = {}
        """The offsets the tail was given in this poll; it moves some itself (``start_at =
        "end"`` skips the lines already in a file at the first start)."""

    @classmethod
    def from_settings(cls, settings: FileSourceConfig, context: SourceContext) -> Self:
        columns: dict[str, str | None] = {"value": settings.value, "time": settings.time}
        columns |= {"stream": settings.stream, "seq": settings.seq}
        tail = FileTail(
            settings.name,
            settings.glob,
            settings.format,
            settings.start_at,
            columns=columns if settings.format == "csv" else None,
        )
        parser = RowParser(settings, future_tolerance=context.future_tolerance)
        return cls(settings, tail, parser, dict(context.positions))

    def poll(self) -> Iterator[FileLine]:
        self._before = dict(self.committed)
        self._pending = dict(self.committed)
        return self.tail.poll(self._pending)

    def parse(self, item: FileLine, received_at: float) -> Parsed | None:
        if item.record is None and item.error is None:
            return None  # a header or a blank line: it only moves the offset on
        at = (item.file_id, item.end_offset)
        if item.record is None:
            detail = f"{_where(item)}: {item.error}"
            return Parsed(self.name, item.raw, error=item.reason, detail=detail, position=at)
        try:
            reading = self.parser.parse(item.record, received_at)
        except PayloadError as exc:
            detail = f"{_where(item)}: {exc.message}"
            return Parsed(self.name, item.raw, error=exc.reason, detail=detail, position=at)
        return Parsed(self.name, item.raw, reading=reading, position=at)

    def refused(self, item: FileLine, reason: str, detail: str) -> Parsed:
        at = (item.file_id, item.end_offset)
        return Parsed(
            self.name, item.raw, error=reason, detail=f"{_where(item)}: {detail}", position=at
        )

    def positions(self, items: Sequence[FileLine]) -> dict[str, int]:
        advanced = {line.file_id: line.end_offset for line in items}
        # offsets the tail moved itself (start_at=end skips a file's existing lines)
        for ident, offset in self._pending.items():
            moved = self._before.get(ident) != offset
            if moved and ident not in advanced and ident not in self.committed:
                advanced[ident] = offset
        return advanced

    def acknowledge(self, items: Sequence[FileLine]) -> None:
        self.committed.update(self.positions(items))


def _where(line: FileLine) -> str:
    start = line.end_offset - len(line.raw) if line.start is None else line.start
    return f"{line.path}, line {line.line}" if line.line else f"{line.path} at byte {start}"
