"""Find plugin classes by type name through an entry-point group, importing only what is used.

One loader serves every kind of plugin (notifiers, sources): a kind names its entry-point group,
the base class its plugins subclass and the base of their ``Settings`` model. Why entry points
for the built-ins too: one path for every plugin means a third-party one is exactly as capable
as a built-in, and a test of the built-ins is a test of the mechanism. Why lazy: importing a
plugin's module pulls in its client library (paho, smtplib, protobuf ...); a site that uses one
kind should not pay for, or break on, the others. A class is imported the first time its type
name is asked for, and each plugin is checked then: a subclass of the base, with a ``Settings``
model whose ``type`` is ``Literal["<its entry-point name>"]``.

A third-party package registers its plugins in its own ``pyproject.toml``::

    [project.entry-points."limitwatch.sources"]
    historian = "plant_historian.limitwatch:HistorianSource"

>>> from limitwatch.alerts.notifiers.base import Notifier, NotifierSettings
>>> kind = PluginKind("limitwatch.notifiers", "notifier", Notifier, NotifierSettings)
>>> "console" in kind.known_types()
True
>>> kind.load("nosuch")
Traceback (most recent call last):
...
limitwatch.plugins.UnknownPluginError: unknown notifier type 'nosuch'; installed types are: ...

References
----------
Python Packaging User Guide, "Entry points specification"
(https://packaging.python.org/en/latest/specifications/entry-points/); Python docs,
``importlib.metadata.entry_points``.
"""

from __future__ import annotations

from importlib.metadata import EntryPoint, entry_points
from typing import Any, Generic, TypeVar

__all__ = ["PluginError", "PluginKind", "UnknownPluginError"]

P = TypeVar("P")


class UnknownPluginError(LookupError):
    """No plugin of that type name is installed; the message lists those that are."""


class PluginError(Exception):
    """A registered plugin could not be loaded or does not keep its kind's contract."""


class PluginKind(Generic[P]):
    """The plugins registered under one entry-point group."""

    def __init__(
        self,
        group: str,
        what: str,
        base: type[Any],
        settings_base: type[Any],
        *,
        unknown: type[UnknownPluginError] = UnknownPluginError,
        broken: type[PluginError] = PluginError,
    ) -> None:
        """``unknown`` and ``broken`` let a kind raise its own subclasses of the two errors."""
        self.group = group
        self.what = what
        self.base = base
        self.settings_base = settings_base
        self.unknown = unknown
        self.broken = broken
        self._loaded: dict[str, type[P]] = {}
        """Type name -> class, once loaded and checked."""

    def _entry_points(self) -> dict[str, EntryPoint]:
        found: dict[str, EntryPoint] = {}
        for ep in entry_points(group=self.group):
            other = found.get(ep.name)
            if other is not None and other.value != ep.value:
                raise self.broken(
                    f"two installed packages register a {self.what} type {ep.name!r} "
                    f"({other.value} and {ep.value}); uninstall one of them."
                )
            found[ep.name] = ep
        return found

    def known_types(self) -> list[str]:
        """Names of every installed type, sorted; nothing is imported."""
        return sorted(self._entry_points())

    def unknown_error(self, type_name: object) -> UnknownPluginError:
        listing = ", ".join(self.known_types()) or "(none)"
        if not isinstance(type_name, str):
            return self.unknown(
                f"a {self.what} needs a 'type' naming what kind it is; installed types are: "
                f"{listing}"
            )
        return self.unknown(
            f"unknown {self.what} type {type_name!r}; installed types are: {listing}"
        )

    def load(self, type_name: str) -> type[P]:
        """The class registered as ``type_name``, imported on first use.

        Raises :class:`UnknownPluginError` naming the installed types, or :class:`PluginError`
        when the plugin fails to import or does not keep the contract.
        """
        cls = self._loaded.get(type_name)
        if cls is not None:
            return cls
        ep = self._entry_points().get(type_name)
        if ep is None:
            raise self.unknown_error(type_name)
        what = f"{self.what} type {type_name!r} ({ep.value})"
        try:
            loaded = ep.load()
        except Exception as exc:
            raise self.broken(f"{what} could not be loaded: {exc}") from exc
        base = self.base
        if not (isinstance(loaded, type) and issubclass(loaded, base)):
            raise self.broken(
                f"{what} is not a subclass of {base.__module__}.{base.__qualname__}"
            )
        settings = getattr(loaded, "Settings", None)
        if not (isinstance(settings, type) and issubclass(settings, self.settings_base)):
            raise self.broken(
                f"{what} has no Settings model derived from {self.settings_base.__name__}"
            )
        fields: Any = getattr(settings, "model_fields", {})
        declared = fields["type"].annotation if "type" in fields else None
        if getattr(declared, "__args__", None) != (type_name,):
            raise self.broken(
                f"{what}: its Settings.type must be Literal[\"{type_name}\"], the name it is "
                "registered under"
            )
        self._loaded[type_name] = loaded
        return loaded

    def settings_model(self, type_name: str) -> Any:
        """The pydantic model that validates a config table of this type."""
        return self.load(type_name).Settings  # type: ignore[attr-defined]  # checked in load()
