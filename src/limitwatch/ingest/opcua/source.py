"""The OPC UA source: data change notifications of a server's variables become readings.

The client thread (:mod:`.connection`) puts each notification on the intake as a
:class:`~limitwatch.ingest.opcua.values.Change`; :meth:`OpcuaSource.parse` judges it
(:func:`~limitwatch.ingest.opcua.values.read_change`: status, value, time).

**Acknowledgements.** OPC UA has none: the server sends each change once, on its publishing
interval, and never again (a subscription's retransmission queue only covers a Publish
response lost on the way, while the session lives). So :meth:`OpcuaSource.acknowledge` tells
the server nothing. What that means for durability: a change that reached the intake but not
the store when the service died is lost, and so is every change made while the service was
down or the connection was lost -- unless the server keeps history (HistoryRead): then each
new session reads the gap back first (``backfill``, see :mod:`.connection`), from each
stream's last committed reading. When a session begins, the server also sends each variable's
current value.

**Repeats.** That current value is often the one already stored (the variable did not change
during the outage). A change with the same source time stamp, status and value as the last one
parsed for its stream is dropped without a dead letter (counted as ``repeats_skipped``)
instead of being refused as a ``duplicate`` after every reconnect. The last committed change
per stream is kept in a small JSON file beside the database (written at most every
``SAVE_EVERY`` seconds and at a clean stop): after a restart it is both what a repeat is
compared with and where a backfill starts. After a crash the file may be up to ``SAVE_EVERY``
behind, so a backfill may bring that second's values again (``duplicate`` dead letters).
"""

from __future__ import annotations

import json
import logging
import os
import queue
import threading
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Self

try:
    import asyncua  # noqa: F401 -- fail at load, with the words that fix it
except ImportError as exc:  # pragma: no cover -- the test extra installs it
    raise ImportError(
        "the opcua source needs the asyncua package: pip install 'limitwatch[opcua]'"
    ) from exc

from limitwatch.ingest.base import Parsed, Source, SourceContext, SourceHealth
from limitwatch.ingest.opcua.connection import OpcuaConnection
from limitwatch.ingest.opcua.settings import OpcuaSourceConfig
from limitwatch.ingest.opcua.values import Change, clock_used, read_change
from limitwatch.ingest.timeparse import format_time
from limitwatch.secrets import resolve_secret

__all__ = ["OpcuaSource"]

log = logging.getLogger("limitwatch.opcua")

SAVE_EVERY = 1.0
"""Least seconds between two writes of the last committed change per stream."""


def _key(change: Change) -> list[Any] | None:
    """What identifies a change the server sends again at a new session."""
    if change.source_time is None:
        return None
    return [change.source_time, change.status, repr(change.value)[:200]]


class OpcuaSource(Source):
    """``type = "opcua"``."""

    Settings = OpcuaSourceConfig
    connection = True

    def __init__(
        self,
        settings: OpcuaSourceConfig,
        password: str | None,
        context: SourceContext,
    ) -> None:
        super().__init__(settings)
        self.config = settings
        self.password = password
        self.future_tolerance = context.future_tolerance
        self.state_file = context.state_file
        self.client: OpcuaConnection | None = None
        self._idle = threading.Event()
        self._committed: dict[str, list[Any]] = _load(self.state_file)
        """Stream -> key of its last committed change (see :func:`_key`)."""
        self._marks: dict[str, float] = _times(self._committed)
        """Stream -> source time of its last committed change, replaced whole (the client
        thread reads it for a backfill)."""
        self._seen: dict[str, list[Any]] = dict(self._committed)
        """Stream -> key of its last change parsed (committed or about to be)."""
        self._dirty = False
        self._saved_at = time.monotonic()
        self.repeats = 0
        self.clocks = {"source": 0, "server": 0, "receipt": 0}

    @classmethod
    def from_settings(cls, settings: OpcuaSourceConfig, context: SourceContext) -> Self:
        password = resolve_secret(
            env=settings.password_env, file=settings.password_file, what=f"sources.{settings.name}"
        )
        return cls(settings, password, context)

    @property
    def subscribed(self) -> threading.Event:
        """Set while the subscription is in place (tests wait for it)."""
        return self._idle if self.client is None else self.client.subscribed

    def start(self, intake: queue.SimpleQueue[Any]) -> None:
        self.client = OpcuaConnection(self.config, self.password, intake, since=lambda: self._marks)
        self.client.start()

    def parse(self, item: Change, received_at: float) -> Parsed | None:
        key = _key(item)
        if key is not None:
            if self._seen.get(item.stream) == key:
                self.repeats += 1
                return None
            self._seen[item.stream] = key
        found = read_change(
            item,
            uncertain=self.config.uncertain,
            future_tolerance=self.future_tolerance,
            received_at=received_at,
        )
        if found.reading is not None:
            self.clocks[clock_used(item)] += 1
        return found

    def refused(self, item: Change, reason: str, detail: str) -> Parsed:
        return Parsed(self.name, item.raw, error=reason, detail=detail)

    def acknowledge(self, items: Sequence[Change]) -> None:
        """Nothing to tell the server (OPC UA has no acknowledgements); remember the last
        committed change of each stream, so that a new session's first values are not
        stored twice."""
        changed = False
        for item in items:
            key = _key(item)
            if key is not None:
                self._committed[item.stream] = key
                changed = True
        if changed:
            self._dirty = True
            self._marks = _times(self._committed)
        if self._dirty and time.monotonic() - self._saved_at >= SAVE_EVERY:
            self._save()

    def _save(self) -> None:
        self._saved_at = time.monotonic()
        self._dirty = False
        try:
            _store(self.state_file, self._committed)
        except OSError as exc:
            log.warning(
                "opcua %s: could not keep the last values in %s: %s",
                self.name,
                self.state_file,
                exc,
            )

    def health(self) -> SourceHealth:
        client = self.client
        detail: dict[str, Any] = {
            "endpoint": self.config.endpoint,
            "repeats_skipped": self.repeats,
            "times_from_server_clock": self.clocks["server"],
            "times_from_receipt": self.clocks["receipt"],
        }
        if client is None:
            return SourceHealth(connected=False, ready=False, detail=detail)
        detail["sessions"] = client.sessions
        detail["changes_received"] = client.changes
        if client.down_since is not None:
            detail["down_since"] = format_time(client.down_since)
        detail["backfilled"] = client.backfilled
        if client.history_problems:
            detail["history_not_read"] = dict(client.history_problems)
        if client.item_problems:
            detail["items_not_monitored"] = dict(client.item_problems)
        return SourceHealth(
            connected=client.connected.is_set(),
            ready=client.subscribed.is_set(),
            last_error=client.last_error,
            restarts=client.restarts,
            detail=detail,
        )

    def close(self) -> None:
        if self.client is not None:
            self.client.close(timeout=self.config.request_timeout + 5.0)
        if self._dirty:
            self._save()


def _times(committed: dict[str, list[Any]]) -> dict[str, float]:
    return {stream: float(key[0]) for stream, key in committed.items() if isinstance(key[0], float)}


def _load(path: Path | None) -> dict[str, list[Any]]:
    if path is None or not path.exists():
        return {}
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        return {str(k): list(v) for k, v in data["last"].items()}
    except (OSError, ValueError, KeyError, TypeError, AttributeError) as exc:
        log.warning(
            "opcua: %s could not be read (%s); a new session's first values may be refused "
            "as duplicates once",
            path,
            exc,
        )
        return {}


def _store(path: Path | None, last: dict[str, list[Any]]) -> None:
    if path is None:
        return
    temporary = path.with_name(path.name + ".new")
    fd = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w", encoding="utf-8") as handle:
        json.dump({"last": last}, handle)
    os.replace(temporary, path)
