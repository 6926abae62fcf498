"""File sources' committed byte offsets, written in the batch that used the lines."""

from __future__ import annotations

from collections.abc import Mapping

from limitwatch.store.base import StoreBase


class FileOffsetsArea(StoreBase):
    """Where each file source has read up to."""

    def file_offsets(self, source: str) -> dict[str, int]:
        """Committed byte offsets of a file source, by file identity."""
        rows = self._all(
            "SELECT file_id, byte_offset FROM file_offsets WHERE source = ?", (source,)
        )
        return {r["file_id"]: int(r["byte_offset"]) for r in rows}

    def save_file_offsets(self, source: str, offsets: Mapping[str, int], *, now: float) -> None:
        """Upsert offsets; call inside the batch transaction that used the lines before them."""
        with self.transaction():
            self.sql.executemany(
                """INSERT INTO file_offsets (source, file_id, byte_offset, updated_at)
                VALUES (?, ?, ?, ?)
                ON CONFLICT (source, file_id) DO UPDATE SET
                    byte_offset = excluded.byte_offset, updated_at = excluded.updated_at""",
                [(source, fid, int(off), now) for fid, off in offsets.items()],
            )
