"""The one database that holds everything limitwatch must not forget: an SQLite file (the
default, nothing to set up) or a PostgreSQL database that several services share.

Why one file and one writer: a batch of readings, the alert changes it causes and the
notifications those changes owe must land together or not at all, so a crash between them can
neither lose a reading nor send a notification twice. SQLite gives that with one transaction per
batch. Write-ahead logging (WAL) lets the operator's CLI read while the service writes, and
``synchronous=NORMAL`` keeps every committed batch across a process crash (``FULL`` would be needed
to survive power loss as well).

Layout: ``schema`` (numbered migrations and the upgrade), ``records`` (the dataclasses handed out
and taken in), ``errors``, ``base`` (opening, transactions) and one module per data area --
``readings`` (readings, streams, checkpoints), ``baselines``, ``incidents`` (incidents, their rules
and events, floods), ``shelves``, ``outbox``, ``deadletters``, ``offsets`` (file sources),
``partitions`` (Kafka). The
:class:`Store` below is composed of the areas; callers import everything from ``limitwatch.store``.

Open one with :func:`open_store` (a file path, ``sqlite:///path`` or ``postgresql://...``; the
service, the outbox worker and every command go through it) or :func:`open_store_read_only`. The
areas keep one copy of their logic over a small connection adapter per backend
(``connection``, ``sqlite_conn``, ``pg_conn``); each backend has its own numbered migrations
(``schema``, ``pgschema``).

Times are epoch seconds supplied by the caller (``now``); nothing here reads a clock, so replay and
tests behave exactly like the live service.

Example:

>>> import pathlib, tempfile
>>> with tempfile.TemporaryDirectory() as tmp:
...     with Store.open(pathlib.Path(tmp) / "plant.db", now=0.0) as store:
...         with store.transaction():
...             letter = store.add_dead_letter("demo-file", b"7,,x", "no value column", now=5.0)
...         (store.journal_mode, store.schema_version() == MIGRATIONS[-1].version, letter)
('wal', True, 1)

References
----------
SQLite documentation, "Write-Ahead Logging" (https://www.sqlite.org/wal.html) and "PRAGMA
synchronous" (https://www.sqlite.org/pragma.html#pragma_synchronous): in WAL mode NORMAL is
durable across application crashes; BEGIN IMMEDIATE (https://www.sqlite.org/lang_transaction.html)
takes the write lock at the start, so reads made inside a batch see no concurrent writer.
"""

from __future__ import annotations

from pathlib import Path

from limitwatch.store.base import StoreBase
from limitwatch.store.baselines import BaselinesArea
from limitwatch.store.deadletters import DeadLettersArea
from limitwatch.store.errors import (
    AlertAlreadyAcknowledged,
    AlertAlreadyCleared,
    AlertAlreadyOpen,
    AlertNotFound,
    BaselineVersionConflict,
    Fenced,
    NotADatabase,
    NotificationNotFound,
    NotShelved,
    SchemaTooNew,
    SchemaTooOld,
    ShelfRejected,
    StoreError,
    StoreUnavailable,
)
from limitwatch.store.incidents import IncidentsArea
from limitwatch.store.location import StoreLocation, is_postgresql, parse_location
from limitwatch.store.offsets import FileOffsetsArea
from limitwatch.store.outbox import OutboxArea
from limitwatch.store.partitions import PartitionRow, PartitionsArea
from limitwatch.store.readings import ReadingsArea
from limitwatch.store.records import (
    ALERT_BOOKKEEPING,
    ALERT_STATES,
    CONFIG_AUTHOR,
    DEAD_LETTER_KEEP_BYTES,
    EVENT_KINDS,
    SEVERITIES,
    SYSTEM_ACTOR,
    Alert,
    AlertEvent,
    AlertState,
    Baseline,
    ChangeSet,
    DeadLetter,
    EventRow,
    Flood,
    Incident,
    Notification,
    OutboxRow,
    RuleTally,
    Shelf,
    StoredReading,
    StreamRow,
    read_json,
    same_numbers,
    signal_context,
    zone_of,
)
from limitwatch.store.schema import MIGRATIONS, Migration, migrate
from limitwatch.store.shelves import ShelvesArea

__all__ = [
    "ALERT_BOOKKEEPING",
    "ALERT_STATES",
    "CONFIG_AUTHOR",
    "DEAD_LETTER_KEEP_BYTES",
    "EVENT_KINDS",
    "MIGRATIONS",
    "SEVERITIES",
    "SYSTEM_ACTOR",
    "Alert",
    "AlertAlreadyAcknowledged",
    "AlertAlreadyCleared",
    "AlertAlreadyOpen",
    "AlertEvent",
    "AlertNotFound",
    "AlertState",
    "Baseline",
    "BaselineVersionConflict",
    "ChangeSet",
    "DeadLetter",
    "EventRow",
    "Fenced",
    "Flood",
    "Incident",
    "Migration",
    "NotADatabase",
    "NotShelved",
    "Notification",
    "NotificationNotFound",
    "OutboxRow",
    "PartitionRow",
    "RuleTally",
    "SchemaTooNew",
    "SchemaTooOld",
    "Shelf",
    "ShelfRejected",
    "Store",
    "StoreError",
    "StoreLocation",
    "StoreUnavailable",
    "StoredReading",
    "StreamRow",
    "is_postgresql",
    "migrate",
    "open_store",
    "open_store_read_only",
    "parse_location",
    "read_json",
    "same_numbers",
    "signal_context",
    "zone_of",
]


class Store(
    ReadingsArea,
    BaselinesArea,
    FileOffsetsArea,
    DeadLettersArea,
    ShelvesArea,
    IncidentsArea,
    OutboxArea,
    PartitionsArea,
    StoreBase,
):
    """limitwatch's persistent state over one :class:`sqlite_utils.Database`.

    Open with :meth:`open`; group writes with :meth:`transaction`. Every write method may be called
    on its own (it then commits by itself) or inside a transaction (it then joins it).

    >>> import pathlib, tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     with Store.open(pathlib.Path(tmp) / "plant.db", now=0.0) as store:
    ...         store.save_checkpoint("line-1/scrap", {"n": 3}, now=60.0)
    ...         store.load_checkpoints()
    {'line-1/scrap': {'n': 3}}
    """


def open_store(
    location: str | Path | StoreLocation, *, now: float | None = None, busy_timeout_s: float = 5.0
) -> Store:
    """Open (creating if needed) and upgrade the store at ``location``: a file path,
    ``sqlite:///path`` or ``postgresql://user@host:port/database``. ``now`` is recorded as the
    time any migration was applied."""
    where = location if isinstance(location, StoreLocation) else parse_location(location)
    if where.url is not None:
        return Store.open_postgresql(where.url, now=now)
    assert where.path is not None
    return Store.open(where.path, now=now, busy_timeout_s=busy_timeout_s)


def open_store_read_only(
    location: str | Path | StoreLocation, *, described: str | None = None
) -> Store:
    """Open an existing store to read only; see :meth:`Store.open_read_only`."""
    where = location if isinstance(location, StoreLocation) else parse_location(location)
    if where.url is not None:
        return Store.open_postgresql(where.url, read_only=True)
    assert where.path is not None
    return Store.open_read_only(where.path, described=described)
