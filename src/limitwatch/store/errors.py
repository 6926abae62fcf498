"""The store's named errors: each message says what went wrong and how to fix it."""

from __future__ import annotations


class StoreError(Exception):
    """Base of every error this module raises on purpose."""


class NotADatabase(StoreError):
    """The path exists but is not an SQLite file."""


class StoreUnavailable(StoreError):
    """The database server cannot be reached, or refused the connection."""


class SchemaTooNew(StoreError):
    """The file was written by a newer limitwatch than this one."""


class SchemaTooOld(StoreError):
    """A read-only look at a file whose schema this code no longer reads; opening it to write
    upgrades it."""


class AlertNotFound(StoreError, LookupError):
    """No alert has the given id."""


class AlertAlreadyCleared(StoreError):
    """The alert has cleared; acknowledging it would mean nothing."""


class AlertAlreadyAcknowledged(StoreError):
    """Someone acknowledged the alert already."""


class AlertAlreadyOpen(StoreError):
    """The stream already has a live (open or acknowledged) incident."""


class ShelfRejected(StoreError, ValueError):
    """A shelf request that cannot be honoured as given (no reason, end time not in the future)."""


class NotShelved(StoreError, LookupError):
    """Unshelve asked for, but nothing is shelved for that stream (and rule)."""


class NotificationNotFound(StoreError, LookupError):
    """No outbox row has the given id."""


class BaselineVersionConflict(StoreError):
    """A baseline version was given that is not newer than the stream's current one."""


def _no_alert(alert_id: int) -> str:
    return f"no alert has id {alert_id}; list the alerts to find the right id."


def _no_notification(notification_id: int) -> str:
    return f"no outbox row has id {notification_id}; it may have been pruned or never existed."


class Fenced(StoreError):
    """A worker wrote for a Kafka partition it no longer owns: another worker took it (a
    rebalance while this one stalled). The batch must roll back whole; the partition's streams
    belong to the new owner now."""

    def __init__(self, topic: str, partition: int, owner: str, generation: int) -> None:
        self.topic = topic
        self.partition = partition
        self.owner = owner
        self.generation = generation
        super().__init__(
            f"partition {partition} of topic {topic!r} is no longer owned by {owner!r} "
            f"(generation {generation}): another worker took it over; this batch is rolled "
            "back and the partition's streams are left to the new owner"
        )
