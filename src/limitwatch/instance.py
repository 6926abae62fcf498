"""The service's database lock, now :mod:`limitwatch.service.lock`; still importable from here."""

from __future__ import annotations

from limitwatch.service.lock import AlreadyRunning, InstanceLock, LockError

__all__ = ["AlreadyRunning", "InstanceLock", "LockError"]
