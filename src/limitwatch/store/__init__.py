"""The one SQLite file that holds everything limitwatch must not forget.

Why one file and one writer: a batch of readings, the alert changes it causes and the
notifications those changes owe must land together or not at all, so a crash between them can
neither lose a reading nor send a notification twice. SQLite gives that with one transaction per
batch. Write-ahead logging (WAL) lets the operator's CLI read while the service writes, and
``synchronous=NORMAL`` keeps every committed batch across a process crash (``FULL`` would be needed
to survive power loss as well).

Layout: ``schema`` (numbered migrations and the upgrade), ``records`` (the dataclasses handed out
and taken in), ``errors``, ``base`` (opening, transactions) and one module per data area --
``readings`` (readings, streams, checkpoints), ``baselines``, ``incidents`` (incidents, their rules
and events, floods), ``shelves``, ``outbox``, ``deadletters``, ``offsets`` (file sources). The
:class:`Store` below is composed of the areas; callers import everything from ``limitwatch.store``.

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

from limitwatch.store.base import StoreBase
from limitwatch.store.baselines import BaselinesArea
from limitwatch.store.deadletters import DeadLettersArea
from limitwatch.store.errors import (
    AlertAlreadyAcknowledged,
    AlertAlreadyCleared,
    AlertAlreadyOpen,
    AlertNotFound,
    BaselineVersionConflict,
    NotADatabase,
    NotificationNotFound,
    NotShelved,
    SchemaTooNew,
    SchemaTooOld,
    ShelfRejected,
    StoreError,
)
from limitwatch.store.incidents import IncidentsArea
from limitwatch.store.offsets import FileOffsetsArea
from limitwatch.store.outbox import OutboxArea
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
    "Flood",
    "Incident",
    "Migration",
    "NotADatabase",
    "NotShelved",
    "Notification",
    "NotificationNotFound",
    "OutboxRow",
    "RuleTally",
    "SchemaTooNew",
    "SchemaTooOld",
    "Shelf",
    "ShelfRejected",
    "Store",
    "StoreError",
    "StoredReading",
    "StreamRow",
    "migrate",
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
