"""Shelves: notifications held for planned work, by stream glob and rule."""

from __future__ import annotations

from collections.abc import Sequence

from limitwatch.store.base import inserted
from limitwatch.store.errors import (
    NotShelved,
    ShelfRejected,
)
from limitwatch.store.incidents import IncidentsArea
from limitwatch.store.records import (
    Alert,
    Shelf,
    _iso,
)


class ShelvesArea(IncidentsArea):
    """Shelving and unshelving incidents' notifications (over the incidents they cover)."""

    def shelve(
        self,
        stream: str,
        rule: str | None = None,
        *,
        until: float,
        reason: str,
        by: str,
        now: float,
    ) -> Shelf:
        """Hold notifications for ``stream`` (or one rule of it) until ``until``. Alerts are still
        opened, counted and cleared; live alerts it covers get a ``shelved`` event."""
        if not reason or not reason.strip():
            raise ShelfRejected(
                "a shelf needs a reason, e.g. 'planned maintenance on line 2'; give one so the "
                "audit trail says why notifications were held."
            )
        if until <= now:
            raise ShelfRejected(
                f"a shelf must end in the future, but {_iso(until)} is not after {_iso(now)}; "
                "give a positive duration."
            )
        with self.transaction():
            self.sql.announce_change()
            shelf_id = self.sql.insert_id(
                """INSERT INTO shelves (stream, rule, created_at, until, reason, shelved_by)
                VALUES (?, ?, ?, ?, ?, ?)""",
                (stream, rule, now, until, reason, by),
            )
            shelf = self._shelf(inserted(shelf_id))
            for alert in self._live_covered(stream, rule):
                self.add_alert_event(
                    alert.id,
                    "shelved",
                    now=now,
                    actor=by,
                    note=f"notifications held until {_iso(until)}: {reason}",
                    data={"shelf_id": shelf.id, "until": until},
                )
        return shelf

    def shelve_streams(
        self,
        streams: Sequence[str],
        rule: str | None = None,
        *,
        until: float,
        reason: str,
        by: str,
        now: float,
        pattern: str | None = None,
    ) -> list[tuple[Shelf, list[Shelf]]]:
        """Shelve several streams in one transaction (one row each, all naming ``pattern``).
        A live shelf for the same stream and rule is ended and replaced by the new one; each
        new shelf comes back with the shelves it replaced, so the caller can say whether it
        extends or shortens them."""
        done: list[tuple[Shelf, list[Shelf]]] = []
        with self.transaction():
            self.sql.announce_change()
            live = self.active_shelves(now)
            for stream in streams:
                old = [s for s in live if s.stream == stream and s.rule == rule]
                if old:
                    self.sql.executemany(
                        "UPDATE shelves SET ended_at = ?, ended_by = ? WHERE id = ?",
                        [(now, by, s.id) for s in old],
                    )
                shelf = self.shelve(stream, rule, until=until, reason=reason, by=by, now=now)
                if pattern is not None:
                    self.sql.execute(
                        "UPDATE shelves SET pattern = ? WHERE id = ?", (pattern, shelf.id)
                    )
                    shelf = self._shelf(shelf.id)
                done.append((shelf, old))
        return done

    def unshelve(self, stream: str, rule: str | None = None, *, by: str, now: float) -> list[Shelf]:
        """End the stream's live shelves now: all of them when ``rule`` is None, else only that
        rule's. Raises :class:`NotShelved` when there is nothing to end."""
        with self.transaction():
            self.sql.announce_change()
            live = [
                s
                for s in self.active_shelves(now)
                if s.stream == stream and (rule is None or s.rule == rule)
            ]
            if not live:
                what = f"stream {stream!r}" + ("" if rule is None else f" rule {rule!r}")
                raise NotShelved(
                    f"nothing is shelved for {what} at {_iso(now)}; list the active shelves "
                    "to see what is."
                )
            self.sql.executemany(
                "UPDATE shelves SET ended_at = ?, ended_by = ? WHERE id = ?",
                [(now, by, s.id) for s in live],
            )
            for alert in self._live_covered(stream, rule):
                self.add_alert_event(
                    alert.id,
                    "unshelved",
                    now=now,
                    actor=by,
                    data={"shelf_ids": [s.id for s in live]},
                )
            return [self._shelf(s.id) for s in live]

    def active_shelves(self, now: float) -> list[Shelf]:
        """Shelves in force at ``now`` (not ended, not yet expired), oldest first."""
        rows = self._all(
            "SELECT * FROM shelves WHERE ended_at IS NULL AND until > ? ORDER BY id", (now,)
        )
        return [Shelf(**r) for r in rows]

    def _shelf(self, shelf_id: int) -> Shelf:
        row = self._one("SELECT * FROM shelves WHERE id = ?", (shelf_id,))
        assert row is not None
        return Shelf(**row)

    def _live_covered(self, stream: str, rule: str | None) -> list[Alert]:
        return [a for a in self.live_alerts([stream]) if rule is None or rule in a.rules]

    # ---- notification outbox
