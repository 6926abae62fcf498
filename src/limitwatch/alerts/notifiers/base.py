"""The one contract every notifier keeps, built-in or third-party.

Why so small: the outbox owns everything that is the same for every channel -- when to try, how
often to retry, when to give up, never sending twice after success. A notifier only turns one
notification into one attempt on its channel and says, by raising :class:`DeliveryError`,
whether trying again later could help. That keeps each channel's module short and lets a plugin
author write a notifier without knowing the store.

A notifier is built from its validated settings (``Notifier.from_settings``). Settings are a
pydantic model per notifier type, so the config loader can point at the exact key that is wrong;
secrets are never settings, only *where to find* them (see :mod:`limitwatch.secrets`).

>>> from typing import Literal
>>> class Settings(NotifierSettings):
...     type: Literal["demo"] = "demo"
>>> Settings(name="ops desk")
Settings(type='demo', name='ops desk')
>>> Settings(name="x", password="hunter2")
Traceback (most recent call last):
...
pydantic_core._pydantic_core.ValidationError: 1 validation error for Settings
...

References
----------
APScheduler 3.x and datasette plugin designs (as described in the project's style notes): one
abstract base per kind of plugin, few abstract methods, ``start()``/``close()`` hooks, plugins
found through an entry-point group.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import Any, ClassVar, Self

from pydantic import BaseModel, ConfigDict, Field, model_validator

__all__ = ["DeliveryError", "Notifier", "NotifierSettings"]

_INLINE_SECRET_KEYS = ("password", "secret", "token", "api_key")


class DeliveryError(Exception):
    """One delivery attempt failed.

    ``retryable`` is the notifier's judgement: True when the same notification may succeed later
    unchanged (the receiver is down, busy or slow), False when only a person can fix it (the
    receiver rejected the request, the program does not exist).
    """

    def __init__(self, message: str, *, retryable: bool) -> None:
        super().__init__(message)
        self.message = message
        self.retryable = retryable

    def __str__(self) -> str:
        return self.message


class NotifierSettings(BaseModel):
    """Common settings: ``type`` picks the notifier class, ``name`` is what routes refer to.

    Unknown keys are refused (a misspelt option must not be silently ignored), and keys that look
    like an inline secret get a message saying where secrets go instead. Validation errors do
    not repeat the input, so a secret typed into the wrong key is not copied into a log.
    """

    # Inputs stay out of error texts: a misplaced password must not reach a log.
    model_config = ConfigDict(extra="forbid", frozen=True, hide_input_in_errors=True)

    type: str
    name: str = Field(min_length=1, max_length=100, pattern=r"^[A-Za-z0-9][A-Za-z0-9 _.@:-]*$")

    @model_validator(mode="before")
    @classmethod
    def _no_inline_secrets(cls, data: Any) -> Any:
        if isinstance(data, dict):
            for key in _INLINE_SECRET_KEYS:
                if key in data:
                    raise ValueError(
                        f"'{key}' cannot be written into the configuration; name where the "
                        f"secret lives instead with '{key}_env' (an environment variable) or "
                        f"'{key}_file' (a file only the service user can read), where this "
                        "notifier type offers them"
                    )
        return data


class Notifier(ABC):
    """Delivers notifications to one configured channel.

    Subclasses set ``Settings`` (a :class:`NotifierSettings` subclass whose ``type`` is a
    ``Literal`` of the entry-point name), implement :meth:`from_settings` and :meth:`deliver`,
    and may override :meth:`start` and :meth:`close` for connections they keep.

    ``deliver`` is called from the outbox worker's thread, one notification at a time; it must
    finish (or fail) within the notifier's own timeouts and must not sleep to retry.
    """

    Settings: ClassVar[type[NotifierSettings]]

    def __init__(self, name: str) -> None:
        self.name = name

    @classmethod
    @abstractmethod
    def from_settings(cls, settings: Any) -> Self:
        """Build the notifier from validated settings, resolving any secrets now (fail early)."""

    @abstractmethod
    def deliver(self, notification: dict[str, Any], *, event_id: str) -> None:
        """Make one delivery attempt; raise :class:`DeliveryError` when it did not succeed.

        ``event_id`` is the same on every attempt for the same notification, so a receiver can
        recognise a repeat.
        """

    def start(self) -> None:  # noqa: B027 -- optional hook, deliberately empty
        """Open long-lived resources (connections). Called once before the first delivery."""

    def close(self) -> None:  # noqa: B027 -- optional hook, deliberately empty
        """Release what :meth:`start` or :meth:`deliver` opened. Safe to call twice."""

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.name!r}>"
