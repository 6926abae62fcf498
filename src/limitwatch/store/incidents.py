"""Incidents, their rules and events, and floods: written by the lifecycle's change set
or by an operator's acknowledgement."""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping
from fnmatch import fnmatchcase
from typing import Any

from limitwatch.model import StreamSignal
from limitwatch.store.base import (
    _CHUNK,
    StoreBase,
    inserted,
)
from limitwatch.store.errors import (
    AlertAlreadyAcknowledged,
    AlertAlreadyCleared,
    AlertAlreadyOpen,
    AlertNotFound,
    _no_alert,
)
from limitwatch.store.records import (
    _ALERT_MUTABLE,
    _INCIDENT_COLUMNS,
    _UPDATED_COLUMNS,
    ALERT_STATES,
    EVENT_KINDS,
    SYSTEM_ACTOR,
    Alert,
    AlertEvent,
    ChangeSet,
    Flood,
    _column_value,
    _finite,
    _flood,
    _iso,
    _loads,
    _tally,
    _tally_row,
    signal_context,
)


class IncidentsArea(StoreBase):
    """Incidents (alerts), their per-rule tallies, events and floods."""

    # ---- alerts

    def open_alert(
        self,
        signal: StreamSignal,
        *,
        severity: str,
        now: float,
        actor: str = SYSTEM_ACTOR,
    ) -> Alert:
        """Open a new alert from its first signal and log the ``opened`` event."""
        with self.transaction():
            live = self._one(
                "SELECT id FROM alerts WHERE stream = ? AND state != 'cleared'", (signal.stream,)
            )
            if live is not None:
                raise AlertAlreadyOpen(
                    f"stream {signal.stream!r} already has live incident {live['id']}; a "
                    f"further signal ({signal.rule}) should join that incident, not open another."
                )
            value = _finite(signal.value)
            alert_id = self.next_alert_id()
            self.sql.execute(
                """INSERT INTO alerts (id, stream, rule, state, severity, opened_at, first_time,
                    first_index, first_value, last_time, last_index, last_value, signal_count,
                    quiet_count, seen_time, signal_json)
                VALUES (?, ?, ?, 'open', ?, ?, ?, ?, ?, ?, ?, ?, 1, 0, ?, ?)""",
                (
                    alert_id,
                    signal.stream,
                    signal.rule,
                    severity,
                    now,
                    signal.time,
                    signal.index,
                    value,
                    signal.time,
                    signal.index,
                    value,
                    signal.time,
                    json.dumps(signal_context(signal)),
                ),
            )
            self.sql.execute(
                """INSERT INTO incident_rules (alert_id, rule, severity, signal_count, first_time,
                    first_index, first_value, last_time, last_index, last_value, signal_json)
                VALUES (?, ?, ?, 1, ?, ?, ?, ?, ?, ?, ?)""",
                (
                    alert_id,
                    signal.rule,
                    severity,
                    signal.time,
                    signal.index,
                    value,
                    signal.time,
                    signal.index,
                    value,
                    json.dumps(signal_context(signal)),
                ),
            )
            self.add_alert_event(
                alert_id,
                "opened",
                now=now,
                actor=actor,
                note=f"{signal.rule} on {signal.chart} chart, severity {severity}",
                data={"value": value, "time": signal.time, "index": signal.index},
            )
        return self.alert(alert_id)

    def update_alert(self, alert_id: int, **changes: Any) -> None:
        """Change bookkeeping fields of an alert (counts, last reading, notification times)."""
        unknown = set(changes) - _ALERT_MUTABLE
        if unknown:
            raise ValueError(
                f"update_alert cannot change {sorted(unknown)}; it may change "
                f"{sorted(_ALERT_MUTABLE)}. Use acknowledge() or clear_alert() to change state."
            )
        if not changes:
            return
        if "signal" in changes:
            changes["signal_json"] = json.dumps(changes.pop("signal"))
        sets = ", ".join(f"{column} = ?" for column in changes)
        cur = self.sql.execute(
            f"UPDATE alerts SET {sets} WHERE id = ?", (*changes.values(), alert_id)
        )
        if cur.rowcount == 0:
            raise AlertNotFound(_no_alert(alert_id))

    def clear_alert(
        self, alert_id: int, *, now: float, actor: str = SYSTEM_ACTOR, note: str | None = None
    ) -> Alert:
        """Mark the alert cleared and log it. A later signal opens a new alert."""
        with self.transaction():
            alert = self.alert(alert_id)
            if alert.state == "cleared":
                raise AlertAlreadyCleared(
                    f"alert {alert_id} already cleared at {_iso(alert.cleared_at)}."
                )
            self.sql.execute(
                "UPDATE alerts SET state = 'cleared', cleared_at = ? WHERE id = ?",
                (now, alert_id),
            )
            self.add_alert_event(alert_id, "cleared", now=now, actor=actor, note=note)
        return self.alert(alert_id)

    def acknowledge(self, alert_id: int, *, by: str, note: str | None = None, now: float) -> Alert:
        """Record that ``by`` has seen the alert and is acting on it; reminders and escalation
        stop. Raises :class:`AlertNotFound`, :class:`AlertAlreadyCleared` or
        :class:`AlertAlreadyAcknowledged` with a message fit to show the operator."""
        with self.transaction():
            self.sql.announce_change()  # first: waits for batches in flight (PostgreSQL)
            alert = self.alert(alert_id)
            if alert.state == "cleared":
                raise AlertAlreadyCleared(
                    f"alert {alert_id} ({alert.stream}, {alert.rule}) already cleared at "
                    f"{_iso(alert.cleared_at)}, so there is nothing to acknowledge. If the "
                    "problem is back, a new alert has been opened: list the stream's alerts to "
                    "find it."
                )
            if alert.state == "acknowledged":
                raise AlertAlreadyAcknowledged(
                    f"alert {alert_id} was already acknowledged by {alert.acknowledged_by} at "
                    f"{_iso(alert.acknowledged_at)}; its event log shows who did what."
                )
            self.sql.execute(
                """UPDATE alerts SET state = 'acknowledged', acknowledged_at = ?,
                    acknowledged_by = ?, ack_note = ? WHERE id = ?""",
                (now, by, note, alert_id),
            )
            self.add_alert_event(alert_id, "acknowledged", now=now, actor=by, note=note)
        self._changed_here()
        return self.alert(alert_id)

    def alert(self, alert_id: int) -> Alert:
        row = self._one("SELECT * FROM alerts WHERE id = ?", (alert_id,))
        if row is None:
            raise AlertNotFound(_no_alert(alert_id))
        return self._with_rules([Alert._from_row(row)])[0]

    def _with_rules(self, alerts: list[Alert]) -> list[Alert]:
        """Fill each incident's ``rules`` from ``incident_rules`` (one query per chunk)."""
        by_id = {a.id: a for a in alerts}
        ids = list(by_id)
        for i in range(0, len(ids), _CHUNK):
            chunk = ids[i : i + _CHUNK]
            rows = self._all(
                f"""SELECT * FROM incident_rules WHERE alert_id IN ({", ".join("?" * len(chunk))})
                ORDER BY alert_id, first_time, rule""",
                chunk,
            )
            for row in rows:
                by_id[row["alert_id"]].rules[row["rule"]] = _tally(row)
        return alerts

    def next_alert_id(self) -> int:
        """The id the next incident gets. Call inside the batch's transaction, which holds the
        write lock, so the lifecycle can name new incidents (and their event ids) before the
        store writes them."""
        return self.sql.next_alert_id()

    def write_changes(self, changes: ChangeSet) -> int:
        """Write one lifecycle decision: changed incidents, new incidents, rule tallies, events
        and outbox rows, each with one ``executemany``; return how many outbox rows are new
        (a row whose key exists already is a replay and changes nothing)."""
        conn = self.sql
        with self.transaction():
            if changes.changed:
                sets = ", ".join(f"{c} = ?" for c in _UPDATED_COLUMNS)
                conn.executemany(
                    f"UPDATE alerts SET {sets} WHERE id = ?",
                    [
                        (*(_column_value(a, c) for c in _UPDATED_COLUMNS), a.id)
                        for a in changes.changed
                    ],
                )
            if changes.opened:
                conn.executemany(
                    f"""INSERT INTO alerts ({", ".join(_INCIDENT_COLUMNS)})
                    VALUES ({", ".join("?" * len(_INCIDENT_COLUMNS))})""",
                    [tuple(_column_value(a, c) for c in _INCIDENT_COLUMNS) for a in changes.opened],
                )
            if changes.rules:
                conn.executemany(
                    """INSERT INTO incident_rules (alert_id, rule, severity, signal_count,
                        first_time, first_index, first_value, last_time, last_index, last_value,
                        signal_json) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)
                    ON CONFLICT (alert_id, rule) DO UPDATE SET severity = excluded.severity,
                        signal_count = excluded.signal_count, last_time = excluded.last_time,
                        last_index = excluded.last_index, last_value = excluded.last_value,
                        signal_json = excluded.signal_json""",
                    [_tally_row(alert_id, t) for alert_id, t in changes.rules],
                )
            if changes.events:
                bad = {e.kind for e in changes.events} - set(EVENT_KINDS)
                if bad:
                    raise ValueError(f"unknown event kind(s) {sorted(bad)}; kinds: {EVENT_KINDS}")
                conn.executemany(
                    """INSERT INTO alert_events (alert_id, kind, time, actor, note, data_json)
                    VALUES (?, ?, ?, ?, ?, ?)""",
                    [
                        (
                            e.alert_id,
                            e.kind,
                            e.time,
                            e.actor,
                            e.note,
                            None if e.data is None else json.dumps(dict(e.data)),
                        )
                        for e in changes.events
                    ],
                )
            if changes.floods:
                conn.executemany(
                    """INSERT INTO floods (id, started_at, ended_at, changes, streams_json)
                    VALUES (?, ?, ?, ?, ?) ON CONFLICT (id) DO UPDATE SET
                        ended_at = excluded.ended_at, changes = excluded.changes,
                        streams_json = excluded.streams_json""",
                    [
                        (f.id, f.started_at, f.ended_at, f.changes, json.dumps(f.streams))
                        for f in changes.floods
                    ],
                )
            queued = 0
            if changes.outbox:
                queued = conn.executemany(
                    """INSERT INTO outbox (idempotency_key, alert_id, route, payload_json,
                        created_at, next_attempt_at, expires_at)
                    VALUES (?, ?, ?, ?, ?, ?, ?)
                    ON CONFLICT (idempotency_key) DO NOTHING""",
                    [
                        (
                            r.key,
                            r.alert_id,
                            r.route,
                            json.dumps(dict(r.payload)),
                            r.created_at,
                            r.created_at,
                            r.expires_at,
                        )
                        for r in changes.outbox
                    ],
                )
        return queued

    def alerts(
        self,
        *,
        state: str | Iterable[str] | None = None,
        stream_glob: str | None = None,
        limit: int | None = None,
    ) -> list[Alert]:
        """Alerts, newest first, filtered by state(s) and a glob on the stream id."""
        where: list[str] = []
        params: list[Any] = []
        if state is not None:
            states = [state] if isinstance(state, str) else list(state)
            bad = set(states) - set(ALERT_STATES)
            if bad:
                raise ValueError(
                    f"unknown alert state(s) {sorted(bad)}; states are {', '.join(ALERT_STATES)}"
                )
            where.append(f"state IN ({', '.join('?' * len(states))})")
            params.extend(states)
        recheck = False
        if stream_glob is not None:
            fragment, more, recheck = self.sql.glob_filter("stream", stream_glob)
            where.append(fragment)
            params.extend(more)
        sql = "SELECT * FROM alerts"
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY id DESC"
        if limit is not None and not recheck:
            sql += " LIMIT ?"
            params.append(limit)
        rows = self._all(sql, params)
        if recheck:
            rows = [r for r in rows if fnmatchcase(r["stream"], stream_glob or "")][:limit]
        return self._with_rules([Alert._from_row(r) for r in rows])

    def live_alerts(self, streams: Iterable[str] | None = None) -> list[Alert]:
        """Open and acknowledged alerts, for the given streams only when given."""
        if streams is None:
            return self._with_rules(
                [
                    Alert._from_row(r)
                    for r in self._all("SELECT * FROM alerts WHERE state != 'cleared' ORDER BY id")
                ]
            )
        wanted = sorted(set(streams))
        found: list[Alert] = []
        for i in range(0, len(wanted), _CHUNK):
            chunk = wanted[i : i + _CHUNK]
            rows = self._all(
                f"""SELECT * FROM alerts WHERE state != 'cleared'
                AND stream IN ({", ".join("?" * len(chunk))}) ORDER BY id""",
                chunk,
            )
            found.extend(Alert._from_row(r) for r in rows)
        return self._with_rules(found)

    def changes_since(self, since: float) -> list[str]:
        """The stream of every incident opened, and of every one cleared, after ``since`` (a
        flood's measure), oldest first."""
        rows = self.sql.execute(
            """SELECT stream, opened_at AS t, id FROM alerts WHERE opened_at > ?
            UNION ALL
            SELECT stream, cleared_at AS t, id FROM alerts WHERE cleared_at > ?
            ORDER BY t, id""",
            (since, since),
        ).fetchall()
        return [r[0] for r in rows]

    def live_flood(self) -> Flood | None:
        """The flood still going on, if any."""
        row = self._one("SELECT * FROM floods WHERE ended_at IS NULL ORDER BY id DESC LIMIT 1")
        return None if row is None else _flood(row)

    def floods(self) -> list[Flood]:
        """Every flood, oldest first."""
        return [_flood(r) for r in self._all("SELECT * FROM floods ORDER BY id")]

    def decide_alone(self) -> None:
        """Call first inside a lifecycle transaction whose reads decide what other workers on
        the same store may decide too (a tick: a flood's end): nobody else's decision runs
        between these reads and this commit. On PostgreSQL this is the numbering lock, which
        every batch takes anyway before it numbers or reads floods; SQLite's write lock, taken
        at BEGIN IMMEDIATE, does it already."""
        self.sql.lock_numbering()

    def next_flood_id(self) -> int:
        self.sql.lock_numbering()
        row = self.sql.execute("SELECT coalesce(max(id), 0) + 1 FROM floods").fetchone()
        return int(row[0])

    def last_seen_times(self, streams: Iterable[str]) -> dict[str, float]:
        """For each stream, the time of the last reading any of its incidents saw."""
        wanted = sorted(set(streams))
        found: dict[str, float] = {}
        for i in range(0, len(wanted), _CHUNK):
            chunk = wanted[i : i + _CHUNK]
            rows = self.sql.execute(
                f"""SELECT stream, max(seen_time) FROM alerts
                WHERE stream IN ({", ".join("?" * len(chunk))}) GROUP BY stream""",
                chunk,
            ).fetchall()
            found.update((stream, seen) for stream, seen in rows if seen is not None)
        return found

    def latest_alert(self, stream: str, rule: str) -> Alert | None:
        """The newest alert of any state for the stream and rule."""
        row = self._one(
            "SELECT * FROM alerts WHERE stream = ? AND rule = ? ORDER BY id DESC LIMIT 1",
            (stream, rule),
        )
        return None if row is None else Alert._from_row(row)

    def add_alert_event(
        self,
        alert_id: int,
        kind: str,
        *,
        now: float,
        actor: str = SYSTEM_ACTOR,
        note: str | None = None,
        data: Mapping[str, Any] | None = None,
    ) -> int:
        if kind not in EVENT_KINDS:
            raise ValueError(f"unknown alert event kind {kind!r}; kinds are {EVENT_KINDS}")
        try:
            # a savepoint of its own: on PostgreSQL a refused statement would otherwise spoil
            # the whole transaction around it
            with self.transaction():
                event_id = self.sql.insert_id(
                    """INSERT INTO alert_events (alert_id, kind, time, actor, note, data_json)
                    VALUES (?, ?, ?, ?, ?, ?)""",
                    (alert_id, kind, now, actor, note, None if data is None else json.dumps(data)),
                )
        except self.sql.integrity as exc:
            raise AlertNotFound(_no_alert(alert_id)) from exc
        return inserted(event_id)

    def alert_events(self, alert_id: int) -> list[AlertEvent]:
        """The alert's audit trail, oldest first."""
        self.alert(alert_id)  # a clear error for an unknown id rather than an empty list
        rows = self._all("SELECT * FROM alert_events WHERE alert_id = ? ORDER BY id", (alert_id,))
        return [
            AlertEvent(
                id=r["id"],
                alert_id=r["alert_id"],
                kind=r["kind"],
                time=r["time"],
                actor=r["actor"],
                note=r["note"],
                data=_loads(r["data_json"], None),
            )
            for r in rows
        ]

    # ---- shelves
