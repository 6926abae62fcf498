"""Baseline versions: the store numbers them, one owner for that fact."""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping
from typing import Any

from limitwatch.store.base import StoreBase
from limitwatch.store.errors import (
    BaselineVersionConflict,
)
from limitwatch.store.records import (
    Baseline,
)


class BaselinesArea(StoreBase):
    """A stream's baseline versions, newest current."""

    def add_baseline(
        self,
        stream: str,
        numbers: Mapping[str, Any],
        *,
        now: float,
        by: str,
        reason: str,
        method: str,
        version: int | None = None,
        first_index: int | None = None,
        last_index: int | None = None,
        first_time: float | None = None,
        last_time: float | None = None,
        excluded: Iterable[int] = (),
    ) -> Baseline:
        """Record a new baseline version for ``stream``; return it.

        Without ``version`` the next number is taken. With one (the engine numbers its own
        baselines), it must be newer than the current version.
        """
        with self.transaction():
            row = self.sql.execute(
                "SELECT max(version) FROM baselines WHERE stream = ?", (stream,)
            ).fetchone()
            current = int(row[0] or 0)
            if version is None:
                version = current + 1
            elif version <= current:
                raise BaselineVersionConflict(
                    f"stream {stream!r} already has baseline version {current}; a new baseline "
                    f"needs a higher version than {version}, or leave the version out to take "
                    "the next one."
                )
            self.sql.execute(
                """INSERT INTO baselines (stream, version, created_at, created_by, reason,
                    method, first_index, last_index, first_time, last_time, excluded_json,
                    numbers_json)
                VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""",
                (
                    stream,
                    version,
                    now,
                    by,
                    reason,
                    method,
                    first_index,
                    last_index,
                    first_time,
                    last_time,
                    json.dumps(sorted(set(excluded))),
                    json.dumps(dict(numbers)),
                ),
            )
        found = self.current_baseline(stream)
        assert found is not None
        return found

    def current_baseline(self, stream: str) -> Baseline | None:
        row = self._one(
            "SELECT * FROM baselines WHERE stream = ? ORDER BY version DESC LIMIT 1", (stream,)
        )
        return None if row is None else Baseline._from_row(row)

    def baseline(self, stream: str, version: int) -> Baseline | None:
        """One stored version of the stream's baseline (e.g. the one that judged a reading)."""
        row = self._one(
            "SELECT * FROM baselines WHERE stream = ? AND version = ?", (stream, version)
        )
        return None if row is None else Baseline._from_row(row)

    def latest_baseline_by(self, stream: str, by: str) -> Baseline | None:
        """The newest baseline of ``stream`` recorded by ``by`` (e.g. the config's)."""
        row = self._one(
            "SELECT * FROM baselines WHERE stream = ? AND created_by = ? "
            "ORDER BY version DESC LIMIT 1",
            (stream, by),
        )
        return None if row is None else Baseline._from_row(row)

    def baseline_history(self, stream: str) -> list[Baseline]:
        """Every baseline of the stream, oldest version first."""
        rows = self._all("SELECT * FROM baselines WHERE stream = ? ORDER BY version", (stream,))
        return [Baseline._from_row(r) for r in rows]

    def baseline_versions(self) -> dict[str, int]:
        """The newest baseline version of every stream, in one query (for noticing refits).

        Rows come as plain tuples, not as a dict each: a restart asks this once for every
        stream of the site, and making 100,000 dicts took longer than the query."""
        sql = "SELECT stream, max(version) FROM baselines GROUP BY stream"
        return {stream: int(version) for stream, version in self.sql.execute(sql).fetchall()}
