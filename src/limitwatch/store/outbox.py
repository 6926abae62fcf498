"""The notification outbox: rows written in the batch's transaction, delivered later."""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

from limitwatch.store.base import StoreBase, inserted_id
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
        cur = self.db.execute(
            """INSERT INTO outbox (idempotency_key, alert_id, route, payload_json, created_at,
                next_attempt_at, expires_at)
            VALUES (?, ?, ?, ?, ?, ?, ?)
            ON CONFLICT (idempotency_key) DO NOTHING""",
            (key, alert_id, route, json.dumps(dict(payload)), now, now, expires_at),
        )
        return inserted_id(cur) if cur.rowcount == 1 else None

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

    def notifications(self, *, alert_id: int | None = None) -> list[Notification]:
        """Every outbox row (of one alert when given), oldest first."""
        if alert_id is None:
            rows = self._all("SELECT * FROM outbox ORDER BY id")
        else:
            rows = self._all("SELECT * FROM outbox WHERE alert_id = ? ORDER BY id", (alert_id,))
        return [_notification(r) for r in rows]

    def mark_delivered(self, notification_id: int, *, now: float) -> None:
        """Record success; the row is never offered again. Marking twice keeps the first time."""
        cur = self.db.execute(
            "UPDATE outbox SET delivered_at = coalesce(delivered_at, ?) WHERE id = ?",
            (now, notification_id),
        )
        if cur.rowcount == 0:
            raise NotificationNotFound(_no_notification(notification_id))

    def mark_failed(self, notification_id: int, error: str, next_attempt_at: float) -> None:
        """Record a failed attempt and when to try again (the caller chooses the backoff)."""
        cur = self.db.execute(
            """UPDATE outbox SET attempts = attempts + 1, last_error = ?, next_attempt_at = ?
            WHERE id = ? AND delivered_at IS NULL""",
            (error, next_attempt_at, notification_id),
        )
        if cur.rowcount == 0:
            row = self._one("SELECT delivered_at FROM outbox WHERE id = ?", (notification_id,))
            if row is None:
                raise NotificationNotFound(_no_notification(notification_id))
            # Already delivered (e.g. a late failure report after a retry succeeded): keep it so.
