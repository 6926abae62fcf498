"""Kafka partitions owned by workers: who owns each, under which generation, and the offset
the next batch starts from.

Why the offset lives here and not only in Kafka: a batch's readings, alerts, outbox rows and
checkpoints commit in one store transaction, and the partition's next offset must commit with
them, or a crash between the two would apply readings twice or skip them. Why a generation:
a worker that stalled past the group's poll interval lost its partitions without knowing; its
late batch must not land on top of the new owner's. Every batch therefore moves the offset
with ``UPDATE ... WHERE owner = ? AND generation = ?``, and no row updated means the partition
was taken over: :class:`~limitwatch.store.errors.Fenced` is raised inside the transaction, so
the whole batch rolls back.

The SQL is plain (``?`` placeholders, ``ON CONFLICT``, no SQLite-only functions) so the
PostgreSQL backend can run it after adapting placeholders.

>>> import pathlib, tempfile
>>> from limitwatch.store import Store
>>> with tempfile.TemporaryDirectory() as tmp:
...     with Store.open(pathlib.Path(tmp) / "plant.db", now=0.0) as store:
...         first = store.take_partition("readings", 0, "worker-a", now=1.0)
...         second = store.take_partition("readings", 0, "worker-b", now=2.0)
...         with store.transaction():
...             store.advance_partition("readings", 0, "worker-b", second.generation, 42, now=3.0)
...         try:
...             store.advance_partition("readings", 0, "worker-a", first.generation, 7, now=4.0)
...         except Fenced as exc:
...             fenced = exc.owner
...         row = store.partition("readings", 0)
...         (first.generation, second.generation, fenced, row.next_offset)
(1, 2, 'worker-a', 42)

References
----------
Martin Kleppmann, *Designing Data-Intensive Applications* (O'Reilly, 2017), ch. 8, "Fencing
tokens": a resource refuses writes carrying an older token than one it has seen.
"""

from __future__ import annotations

from dataclasses import dataclass

from limitwatch.store.base import StoreBase
from limitwatch.store.errors import Fenced


@dataclass(frozen=True, slots=True)
class PartitionRow:
    """One partition's row: its owner (None when released), generation and next offset."""

    topic: str
    partition: int
    owner: str | None
    generation: int
    next_offset: int | None
    """The first offset not yet applied; None before any batch of it committed."""
    taken_at: float | None
    committed_at: float | None


class PartitionsArea(StoreBase):
    """Ownership and positions of Kafka partitions (see the module's description)."""

    def take_partition(self, topic: str, partition: int, owner: str, *, now: float) -> PartitionRow:
        """Make ``owner`` the partition's owner under a new generation, whoever held it;
        return the row (with the next offset to read from). The group coordinator decides who
        owns what; this only makes the previous owner's late writes fail."""
        with self.transaction():
            self.sql.execute(
                """INSERT INTO partitions (topic, partition, owner, generation, taken_at)
                VALUES (?, ?, ?, 1, ?)
                ON CONFLICT (topic, partition) DO UPDATE SET
                    owner = excluded.owner, generation = partitions.generation + 1,
                    taken_at = excluded.taken_at""",
                (topic, partition, owner, now),
            )
            row = self.partition(topic, partition)
        assert row is not None
        return row

    def advance_partition(
        self, topic: str, partition: int, owner: str, generation: int, next_offset: int, *,
        now: float,
    ) -> None:
        """Record ``next_offset`` inside the batch's transaction, if ``owner`` still holds the
        partition under ``generation``; raise :class:`Fenced` otherwise, and the caller's
        transaction rolls back."""
        with self.transaction():
            cursor = self.sql.execute(
                """UPDATE partitions SET next_offset = ?, committed_at = ?
                WHERE topic = ? AND partition = ? AND owner = ? AND generation = ?""",
                (next_offset, now, topic, partition, owner, generation),
            )
            if cursor.rowcount != 1:
                raise Fenced(topic, partition, owner, generation)

    def check_partition(self, topic: str, partition: int, owner: str, generation: int) -> None:
        """Raise :class:`Fenced` unless ``owner`` still holds the partition under
        ``generation`` (for a transaction that writes for it without moving its offset)."""
        row = self._one(
            """SELECT 1 AS held FROM partitions
            WHERE topic = ? AND partition = ? AND owner = ? AND generation = ?""",
            (topic, partition, owner, generation),
        )
        if row is None:
            raise Fenced(topic, partition, owner, generation)

    def release_partition(self, topic: str, partition: int, owner: str, generation: int) -> bool:
        """Give the partition up (owner cleared, offset kept), if still ours; True if it was."""
        with self.transaction():
            cursor = self.sql.execute(
                """UPDATE partitions SET owner = NULL
                WHERE topic = ? AND partition = ? AND owner = ? AND generation = ?""",
                (topic, partition, owner, generation),
            )
        return cursor.rowcount == 1

    def partition(self, topic: str, partition: int) -> PartitionRow | None:
        row = self._one(
            """SELECT topic, partition, owner, generation, next_offset, taken_at, committed_at
            FROM partitions WHERE topic = ? AND partition = ?""",
            (topic, partition),
        )
        return None if row is None else PartitionRow(**row)

    def partitions(self, topic: str | None = None) -> list[PartitionRow]:
        """Every partition's row (of ``topic``, or all), in order."""
        where, params = ("WHERE topic = ?", (topic,)) if topic is not None else ("", ())
        rows = self._all(
            f"""SELECT topic, partition, owner, generation, next_offset, taken_at, committed_at
            FROM partitions {where} ORDER BY topic, partition""",
            params,
        )
        return [PartitionRow(**r) for r in rows]
