"""The plain sections: ``[store]``, ``[service]``, ``[alerts]``, ``[[routes]]``, ``[budget]``.

Each is a frozen model that refuses unknown keys; defaults come from the objects they configure
(:class:`~limitwatch.alerts.lifecycle.AlertPolicy`), so the two cannot drift apart.
"""

from __future__ import annotations

import re
from fnmatch import fnmatchcase
from functools import partial
from pathlib import Path
from typing import Annotated, Any, Literal, cast
from urllib.parse import urlsplit

from pydantic import (
    AfterValidator,
    Field,
    ValidationInfo,
    WrapValidator,
    field_validator,
    model_validator,
)

from limitwatch.alerts.lifecycle import DEFAULT_NOTICES, NOTICE_KINDS, SEVERITIES, AlertPolicy
from limitwatch.config.errors import _fail
from limitwatch.config.value_types import (
    KNOWN_RULES,
    MAX_COUNT,
    Glob,
    Name,
    OffDuration,
    PositiveDuration,
    RetentionDuration,
    Severity,
    _bounded,
    _resolve_path,
    _Section,
)

# --------------------------------------------------------------------------- [store] [service]


def _store_location(value: Any, handler: Any, info: ValidationInfo) -> Path | str:
    """A file path as before, or a store URL: ``postgresql://`` stays a string (never a
    password in it: that goes in PGPASSWORD or ~/.pgpass), ``sqlite:///path`` becomes the path."""
    if isinstance(value, str) and value.lower().startswith(("postgresql://", "postgres://")):
        try:
            password = urlsplit(value).password
        except ValueError as exc:
            raise ValueError(f"{value!r} is not a usable URL ({exc})") from None
        if password is not None:
            raise ValueError(
                "the URL carries a password; put it in PGPASSWORD or ~/.pgpass instead, so the "
                "config file holds no secret"
            )
        return value
    if isinstance(value, str) and "://" in value:
        if not value.lower().startswith("sqlite:///"):
            raise ValueError(
                f"{value!r} is not a store URL: write a file path, sqlite:///path or "
                "postgresql://user@host:port/database"
            )
        value = value[len("sqlite://") :]
    if not isinstance(value, str | Path):
        raise ValueError("give a file path or a store URL as text")
    return _resolve_path(Path(value), info)


class StoreSection(_Section):
    """``[store]``: where the store lives (an SQLite file, or a PostgreSQL URL) and retention."""

    path: Annotated[Path | str, WrapValidator(_store_location)] = Path("limitwatch.db")
    """An SQLite file (a path or ``sqlite:///path``), or ``postgresql://user@host:port/db``."""
    keep_readings_for: RetentionDuration | None = None
    keep_readings_per_stream: int | None = Field(None, ge=1, le=1_000_000_000)
    keep_dead_letters_for: PositiveDuration = 30 * 86400.0
    """Dead letters older than this are dropped by the hourly retention job."""
    keep_dead_letters: int = Field(100_000, ge=1, le=1_000_000_000)
    """At most this many dead letters are kept (the newest)."""

    @property
    def location(self) -> Path | str:
        """What :func:`limitwatch.store.open_store` opens."""
        return self.path

    @property
    def file(self) -> Path | None:
        """The SQLite file, or None when the store is a PostgreSQL database."""
        return self.path if isinstance(self.path, Path) else None

    @property
    def shared(self) -> bool:
        """True for PostgreSQL, which several services may share (no single-instance lock)."""
        return self.file is None


class ServiceSection(_Section):
    """``[service]``: how the worker batches, the metrics and health listener, and how often
    the scheduler looks for stale streams, due reminders/escalations and adopted baselines."""

    batch_max: int = Field(500, ge=1, le=100_000)
    batch_wait: Annotated[PositiveDuration, AfterValidator(partial(_bounded, high=60.0))] = 0.2
    metrics_listen: str | None = None
    stale_check_every: PositiveDuration = 60.0
    alert_tick_every: PositiveDuration = 30.0
    refit_check_every: PositiveDuration = 60.0
    stall_after: PositiveDuration = 60.0
    """``/health`` answers 503 when the worker has not come round its loop for this long (it
    does at least twice a second when idle)."""
    future_tolerance: PositiveDuration = 300.0
    """A reading stamped later than its receive time by more than this is refused
    (``in-the-future``): senders' clocks drift a little, but one reading dated years ahead
    would make every real one look out of order and its stream never look stale."""
    notifier_failing_after: PositiveDuration = 600.0
    """``/health`` turns degraded (503) when a notifier's deliveries have failed, without one
    success, for longer than this."""

    @field_validator("metrics_listen")
    @classmethod
    def _listen(cls, value: str | None) -> str | None:
        if value is not None:
            split_address(value)
        return value

    @property
    def metrics_address(self) -> tuple[str, int] | None:
        """``(host, port)`` for the metrics and health listener, or None when it is off."""
        return None if self.metrics_listen is None else split_address(self.metrics_listen)


def split_address(text: str) -> tuple[str, int]:
    """``host:port`` or ``[IPv6 address]:port`` as ``(host, port)``, brackets removed."""
    match = re.fullmatch(r"(\[[0-9A-Fa-f:.]+\]|[^:\[\]\s]+):(\d{1,5})", text.strip())
    if match is None or not 1 <= int(match.group(2)) <= 65535:
        raise ValueError(f"{text!r} is not host:port; write e.g. '127.0.0.1:9464' or '[::1]:9464'")
    return match.group(1).strip("[]"), int(match.group(2))


_POLICY = AlertPolicy()


class SeverityEntry(_Section):
    """``[[alerts.severity]]``: the severity of alerts for matching streams (and one rule)."""

    streams: Glob = "*"
    rule: str | None = None
    severity: Severity

    @field_validator("rule")
    @classmethod
    def _known_rule(cls, value: str | None) -> str | None:
        if value is not None and value not in KNOWN_RULES:
            raise ValueError(f"unknown rule {value!r}; rules: {', '.join(KNOWN_RULES)}")
        return value


class AlertsSection(_Section):
    """``[alerts]``: the lifecycle knobs; see :class:`~limitwatch.alerts.lifecycle.AlertPolicy`."""

    clear_after: int = Field(_POLICY.clear_after, ge=1, le=MAX_COUNT)
    repeat_every: OffDuration = _POLICY.repeat_every_s
    escalate_after: OffDuration = _POLICY.escalate_after_s
    give_up_after: OffDuration = _POLICY.notification_ttl_s
    max_shelf: PositiveDuration = 7 * 86400.0
    flood_after: Annotated[int, Field(ge=1)] | Literal["off"] = 10
    flood_window: PositiveDuration = _POLICY.flood_window_s
    severity: list[SeverityEntry] = []


class Route(_Section):
    """``[[routes]]``: which notifiers hear about alerts of matching streams and severities."""

    name: Name
    streams: Glob = "*"
    severities: list[Severity] = Field(default_factory=lambda: _all_severities(), min_length=1)
    notifiers: list[str] = []
    escalate_to: list[str] = []
    notify_on: list[Literal[NOTICE_KINDS]] = Field(  # type: ignore[valid-type]
        default_factory=lambda: list(DEFAULT_NOTICES)
    )

    @model_validator(mode="after")
    def _somewhere(self) -> Route:
        if not self.notifiers and not self.escalate_to:
            raise _fail((("notifiers",), "a route needs notifiers, escalate_to, or both"))
        return self

    def covers(self, stream: str, severity: str) -> bool:
        return severity in self.severities and fnmatchcase(stream, self.streams)


class BudgetSection(_Section):
    """``[budget]``: what the planner aims for."""

    false_alarms_per_week: float | None = Field(None, gt=0)


def _all_severities() -> list[Severity]:
    """Every severity, for a route that does not choose (the lifecycle's one list)."""
    return cast("list[Severity]", list(SEVERITIES))
