"""The notification outbox: rows written in the batch's transaction, delivered later."""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

from limitwatch.store.base import StoreBase
from limitwatch.store.errors import (
    NotificationNotFound,
    _no_notification,
)
from limitwatch.store.records import (
    Notification,
    _notification,
)


class OutboxArea(StoreBase):
    """Outbox rows: enqueue, due, delivered, failed."""

    def enqueue_notification(
        self,
        key: str,
        *,
        alert_id: int | None,
        route: str,
        payload: Mapping[str, Any],
        now: float,
        expires_at: float | None = None,
    ) -> int | None:
        """Queue a payload for ``route``; return the new row id, or None when a row with this
        idempotency key exists already (a replay), in which case nothing changes."""
        return self.sql.insert_id(
            """INSERT INTO outbox (idempotency_key, alert_id, route, payload_json, created_at,
                next_attempt_at, expires_at)
            VALUES (?, ?, ?, ?, ?, ?, ?)
            ON CONFLICT (idempotency_key) DO NOTHING""",
            (key, alert_id, route, json.dumps(dict(payload)), now, now, expires_at),
        )

    def due_notifications(self, now: float, *, limit: int = 100) -> list[Notification]:
        """Undelivered, unexpired rows whose next attempt is due, oldest due first."""
        rows = self._all(
            """SELECT * FROM outbox
            WHERE delivered_at IS NULL AND next_attempt_at <= ?
                AND (expires_at IS NULL OR expires_at > ?)
            ORDER BY next_attempt_at, id LIMIT ?""",
            (now, now, limit),
        )
        return [_notification(r) for r in rows]

    def claim_notifications(
        self, now: float, *, by: str, lease_s: float = 300.0, limit: int = 100
    ) -> list[Notification]:
        """The due rows this sender may deliver now, oldest due first.

        On SQLite one service owns the file, so these are simply the due rows. On PostgreSQL
        several services share the outbox: each row comes with a lease of ``lease_s`` seconds
        for ``by`` and this database session (``FOR UPDATE SKIP LOCKED``), so no two deliver the
        same row at once; a row whose sender died is offered again once its session is gone, or
        its lease has run out. Marking the row delivered or failed ends the claim."""
        ids = self.sql.claim_outbox(now, by=by, lease_s=lease_s, limit=limit)
        if ids is None:
            return self.due_notifications(now, limit=limit)
        if not ids:
            return []
        rows = self._all(
            f"""SELECT * FROM outbox WHERE id IN ({", ".join("?" * len(ids))})
            ORDER BY next_attempt_at, id""",
            ids,
        )
        return [_notification(r) for r in rows]

    def expired_waiting(self, now: float, *, parked_at: float, limit: int) -> list[Notification]:
        """Undelivered rows that expired at or before ``now`` while still waiting for an
        attempt (next attempt before ``parked_at``), oldest first."""
        rows = self._all(
            """SELECT * FROM outbox
            WHERE delivered_at IS NULL AND next_attempt_at < ? AND expires_at IS NOT NULL
                AND expires_at <= ?
            ORDER BY id LIMIT ?""",
            (parked_at, now, limit),
        )
        return [_notification(r) for r in rows]

    def park_notification(self, notification_id: int, error: str, parked_at: float) -> None:
        """Give a row up without an attempt: say why, and move its next attempt to
        ``parked_at`` (never). A row delivered meanwhile stays delivered."""
        with self.transaction():
            self.sql.execute(
                """UPDATE outbox SET last_error = ?, next_attempt_at = ?
                WHERE id = ? AND delivered_at IS NULL""",
                (error, parked_at, notification_id),
            )
            self.sql.release_outbox(notification_id)

    def waiting_by_route(self, parked_at: float) -> dict[str, tuple[int, float | None]]:
        """Route -> (rows still to deliver, the oldest one's queue time); rows given up (next
        attempt at ``parked_at``) excluded."""
        rows = self.sql.execute(
            """SELECT route, count(*), min(created_at) FROM outbox
            WHERE delivered_at IS NULL AND next_attempt_at < ? GROUP BY route""",
            (parked_at,),
        ).fetchall()
        return {route: (int(n), oldest) for route, n, oldest in rows}

    def notifications(self, *, alert_id: int | None = None) -> list[Notification]:
        """Every outbox row (of one alert when given), oldest first."""
        if alert_id is None:
            rows = self._all("SELECT * FROM outbox ORDER BY id")
        else:
            rows = self._all("SELECT * FROM outbox WHERE alert_id = ? ORDER BY id", (alert_id,))
        return [_notification(r) for r in rows]

    def mark_delivered(self, notification_id: int, *, now: float) -> None:
        """Record success; the row is never offered again. Marking twice keeps the first time."""
        with self.transaction():
            cur = self.sql.execute(
                "UPDATE outbox SET delivered_at = coalesce(delivered_at, ?) WHERE id = ?",
                (now, notification_id),
            )
            self.sql.release_outbox(notification_id)
        if cur.rowcount == 0:
            raise NotificationNotFound(_no_notification(notification_id))

    def mark_failed(self, notification_id: int, error: str, next_attempt_at: float) -> None:
        """Record a failed attempt and when to try again (the caller chooses the backoff)."""
        with self.transaction():
            cur = self.sql.execute(
                """UPDATE outbox SET attempts = attempts + 1, last_error = ?, next_attempt_at = ?
                WHERE id = ? AND delivered_at IS NULL""",
                (error, next_attempt_at, notification_id),
            )
            self.sql.release_outbox(notification_id)
        if cur.rowcount == 0:
            row = self._one("SELECT delivered_at FROM outbox WHERE id = ?", (notification_id,))
            if row is None:
                raise NotificationNotFound(_no_notification(notification_id))
            # Already delivered (e.g. a late failure report after a retry succeeded): keep it so.
