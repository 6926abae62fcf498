"""Dead letters: input refused, with its reason and the payload (or its start)."""

from __future__ import annotations

import hashlib

from limitwatch.store.base import StoreBase, inserted
from limitwatch.store.records import (
    DEAD_LETTER_KEEP_BYTES,
    DeadLetter,
    _payload_bytes,
)


class DeadLettersArea(StoreBase):
    """Refused input, kept with its reason."""

    def add_dead_letter(
        self, source: str, payload: bytes | str | None, reason: str, *, now: float
    ) -> int:
        """Keep input that could not be used, with the reason; return its id.

        The payload is kept verbatim when it fits in :data:`DEAD_LETTER_KEEP_BYTES`; a longer
        one keeps that many leading bytes (as bytes: a cut may split a UTF-8 character), and
        every dead letter records the whole payload's size and SHA-256."""
        size = digest = None
        if payload is not None:
            whole = _payload_bytes(payload)
            size = len(whole)
            digest = hashlib.sha256(whole).hexdigest()
            if size > DEAD_LETTER_KEEP_BYTES:
                payload = whole[:DEAD_LETTER_KEEP_BYTES]
        return inserted(
            self.sql.insert_id(
                """INSERT INTO dead_letters
                    (source, received_at, reason, payload, payload_size, payload_sha256)
                VALUES (?, ?, ?, ?, ?, ?)""",
                (source, now, reason, self.sql.blob(payload), size, digest),
            )
        )

    def prune_dead_letters(
        self, now: float, *, max_age_s: float | None = None, max_count: int | None = None
    ) -> int:
        """Drop dead letters received before ``now - max_age_s``, then all but the newest
        ``max_count``; return how many went. Dead letters are for finding out what a gateway
        or an export sends wrong, not an archive: without a bound, a gateway sending bad
        messages for months fills the disk."""
        if max_count is not None and max_count < 0:
            raise ValueError(f"max_count must be 0 or more, not {max_count}")
        deleted = 0
        with self.transaction():
            if max_age_s is not None:
                cur = self.sql.execute(
                    "DELETE FROM dead_letters WHERE received_at < ?", (now - max_age_s,)
                )
                deleted += cur.rowcount
            if max_count is not None:
                # ids grow with arrival (AUTOINCREMENT), so the newest are the highest ids
                cur = self.sql.execute(
                    """DELETE FROM dead_letters WHERE id <= (
                        SELECT id FROM dead_letters ORDER BY id DESC LIMIT 1 OFFSET ?
                    )""",
                    (max_count,),
                )
                deleted += cur.rowcount
        return deleted

    def dead_letters(self, *, limit: int = 100) -> list[DeadLetter]:
        """The newest dead letters, newest first."""
        rows = self._all("SELECT * FROM dead_letters ORDER BY id DESC LIMIT ?", (limit,))
        return [DeadLetter(**r) for r in rows]
