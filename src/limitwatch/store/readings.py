"""Readings, stream summaries and checkpoints: the log a restart replays."""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Iterator, Mapping
from fnmatch import fnmatchcase
from typing import Any

from limitwatch.model import Outcome, Reading
from limitwatch.store.base import StoreBase
from limitwatch.store.records import (
    StoredReading,
    StreamRow,
    read_json,
)


class ReadingsArea(StoreBase):
    """Accepted readings, the streams they made and the monitors' checkpoints."""

    def add_readings(self, outcomes: Iterable[Outcome], *, now: float) -> int:
        """Keep accepted readings (refused ones changed nothing and are not kept here) and update
        each stream's summary. A redelivered reading (same stream and time) is ignored."""
        rows = []
        latest: dict[str, Outcome] = {}
        for o in outcomes:
            if not o.accepted:
                continue
            r = o.reading
            fired = " ".join(dict.fromkeys(s.rule for s in o.signals)) if o.signals else ""
            rows.append(
                (r.stream, r.time, r.value, r.seq, o.index, o.phase, o.z, o.mr, fired,
                 o.baseline_version)
            )
            if r.stream not in latest or r.time > latest[r.stream].reading.time:
                latest[r.stream] = o
        if not rows:
            return 0
        with self.transaction():
            stored = self.sql.executemany(
                """INSERT INTO readings
                    (stream, time, value, seq, idx, phase, z, mr, signals, baseline_version)
                VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)
                ON CONFLICT (stream, time) DO NOTHING""",
                rows,
            )
            self.sql.executemany(
                """INSERT INTO streams
                    (id, first_seen, last_seen, last_time, last_value, last_index, phase)
                VALUES (?, ?, ?, ?, ?, ?, ?)
                ON CONFLICT (id) DO UPDATE SET
                    last_seen = excluded.last_seen,
                    last_time = excluded.last_time,
                    last_value = excluded.last_value,
                    last_index = excluded.last_index,
                    phase = excluded.phase
                WHERE streams.last_time IS NULL OR excluded.last_time > streams.last_time""",
                [
                    (s, now, now, o.reading.time, o.reading.value, o.index, o.phase)
                    for s, o in latest.items()
                ],
            )
        return stored

    def recent_readings(self, stream: str, *, last: int | None = None) -> list[StoredReading]:
        """The stream's kept readings, oldest first; only the newest ``last`` when given."""
        sql = "SELECT * FROM readings WHERE stream = ? ORDER BY time DESC"
        params: list[Any] = [stream]
        if last is not None:
            sql += " LIMIT ?"
            params.append(last)
        rows = self._all(sql, params)
        rows.reverse()
        return [
            StoredReading(
                stream=r["stream"],
                time=r["time"],
                value=r["value"],
                seq=r["seq"],
                index=r["idx"],
                phase=r["phase"],
                z=r["z"],
                mr=r["mr"],
                signals=None if r["signals"] is None else tuple(r["signals"].split()),
                baseline_version=r["baseline_version"],
            )
            for r in rows
        ]

    def forget_judged_against(self, stream: str, version: int, *, after: float) -> int:
        """Say "not recorded" for the baseline version of ``stream``'s readings later than
        ``after`` that were stored as judged against ``version``; return how many.

        For a learned fit that was dropped in favour of an operator's version with the same
        number (see the pipeline's ``_record_learned``): the readings of the batch that ran
        past the fit were judged against limits the store never kept, so naming ``version``
        would point at other numbers. Their z-scores still tell their limits."""
        cur = self.sql.execute(
            """UPDATE readings SET baseline_version = NULL
            WHERE stream = ? AND time > ? AND baseline_version = ?""",
            (stream, after, version),
        )
        return cur.rowcount

    def prune_readings(
        self,
        now: float,
        *,
        max_age_s: float | None = None,
        max_per_stream: int | None = None,
    ) -> int:
        """Apply the retention policy; return the number of readings deleted.

        ``max_age_s`` drops readings older than ``now - max_age_s``; ``max_per_stream`` keeps only
        each stream's newest readings. Both may be given; neither means nothing is deleted.
        """
        if max_per_stream is not None and max_per_stream < 0:
            raise ValueError(f"max_per_stream must be 0 or more, not {max_per_stream}")
        deleted = 0
        with self.transaction():
            if max_age_s is not None:
                # Stream by stream through the primary key (stream, time): a range of each
                # stream's oldest readings, never a scan of the table, and no index by time
                # alone to keep up for every reading stored (schema migration 11). Every
                # stored reading's stream has a row in streams (add_readings writes both).
                cur = self.sql.execute(
                    """DELETE FROM readings
                    WHERE stream IN (SELECT id FROM streams) AND time < ?""",
                    (now - max_age_s,),
                )
                deleted += cur.rowcount
            if max_per_stream is not None:
                cur = self.sql.execute(
                    """DELETE FROM readings WHERE (stream, time) IN (
                        SELECT stream, time FROM (
                            SELECT stream, time, row_number() OVER (
                                PARTITION BY stream ORDER BY time DESC
                            ) AS newest_first
                            FROM readings
                        ) AS ranked WHERE newest_first > ?
                    )""",
                    (max_per_stream,),
                )
                deleted += cur.rowcount
        return deleted

    def readings_after(self, stream: str, time: float | None) -> list[Reading]:
        """The stream's kept readings later than ``time`` (all when None), oldest first, as
        the engine first saw them: what a monitor restored from an older checkpoint needs
        again to stand where the last commit left it."""
        rows = self.sql.execute(
            "SELECT time, value, seq FROM readings WHERE stream = ? AND time > ? ORDER BY time",
            (stream, -math.inf if time is None else time),
        )
        return [Reading(stream, t, v, seq) for t, v, seq in rows]

    def last_service_time(self) -> float | None:
        """The latest service time at which a batch with accepted readings committed (the
        newest ``last_seen``), or None for an empty store: a restart goes on from it if the
        wall clock was stepped back meanwhile."""
        row = self.sql.execute("SELECT max(last_seen) FROM streams").fetchone()
        return None if row[0] is None else float(row[0])

    def has_reading(self, reading: Reading, *, seq_horizon_s: float = 86400.0) -> bool:
        """Whether this reading is stored already: same stream, time and value, or (with a
        sequence number) the same sequence number within ``seq_horizon_s`` before its time
        (a redelivery without a time of its own carries a later receive time). Both lookups
        use the primary key's range, never a scan of the stream."""
        found = self.sql.execute(
            "SELECT 1 FROM readings WHERE stream = ? AND time = ? AND value = ?",
            (reading.stream, reading.time, reading.value),
        ).fetchone()
        if found is not None or reading.seq is None:
            return found is not None
        return (
            self.sql.execute(
                """SELECT 1 FROM readings WHERE stream = ? AND time BETWEEN ? AND ?
                AND seq = ? LIMIT 1""",
                (reading.stream, reading.time - seq_horizon_s, reading.time, reading.seq),
            ).fetchone()
            is not None
        )

    def stream_last_times(self) -> dict[str, float | None]:
        """Each stream's latest committed reading time."""
        return dict(self.sql.execute("SELECT id, last_time FROM streams"))

    def streams(self, *, glob: str | None = None) -> list[StreamRow]:
        """Every stream heard from (matching ``glob`` on the id when given), by id, with the
        baseline version that judged its last reading (one primary-key lookup per stream)."""
        sql = """SELECT s.*, r.baseline_version AS last_baseline_version FROM streams s
            LEFT JOIN readings r ON r.stream = s.id AND r.time = s.last_time"""
        if glob is None:
            rows = self._all(sql + " ORDER BY s.id")
        else:
            where, params, recheck = self.sql.glob_filter("s.id", glob)
            rows = self._all(sql + f" WHERE {where} ORDER BY s.id", params)
            if recheck:
                rows = [r for r in rows if fnmatchcase(r["id"], glob)]
        return [StreamRow(**r) for r in rows]

    def save_checkpoint(self, stream: str, state: Mapping[str, Any], *, now: float) -> None:
        """Keep one snapshot per stream; writing again replaces it."""
        self.save_checkpoints({stream: state}, now=now)

    def save_checkpoints(self, states: Mapping[str, Mapping[str, Any]], *, now: float) -> None:
        rows = [(stream, now, json.dumps(dict(state))) for stream, state in states.items()]
        with self.transaction():
            self.sql.executemany(
                """INSERT INTO checkpoints (stream, saved_at, state_json) VALUES (?, ?, ?)
                ON CONFLICT (stream) DO UPDATE SET
                    saved_at = excluded.saved_at, state_json = excluded.state_json""",
                rows,
            )

    def load_checkpoints(self) -> dict[str, dict[str, Any]]:
        return dict(self.iter_checkpoints())

    def iter_checkpoints(self) -> Iterator[tuple[str, dict[str, Any]]]:
        """``(stream, state)`` by stream, one row at a time: a restart of a large site then
        never holds every parsed checkpoint at once."""
        rows = self.sql.execute("SELECT stream, state_json FROM checkpoints ORDER BY stream")
        for stream, state_json in rows:
            yield stream, read_json(state_json)

    def load_checkpoint(self, stream: str) -> dict[str, Any] | None:
        row = self._one("SELECT state_json FROM checkpoints WHERE stream = ?", (stream,))
        return None if row is None else read_json(row["state_json"])

    # ---- baselines
