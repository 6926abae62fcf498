"""Find notifier classes by type name, built-in or third-party, without importing them all.

Why entry points for the built-ins too: one path for every notifier means a plugin is exactly as
capable as a built-in, and a test of the built-ins is a test of the plugin mechanism. Why lazy:
importing a channel's module pulls in its client library (paho, smtplib, ...); a site that only
uses webhooks should not pay for, or break on, the others. A class is imported the first time its
type is asked for.

A third-party package registers a notifier in its own ``pyproject.toml``::

    [project.entry-points."limitwatch.notifiers"]
    pager = "plant_pager.limitwatch:PagerNotifier"

>>> "webhook" in known_types()
True
>>> settings_model("console")(type="console", name="desk").stream
'stdout'

References
----------
Python Packaging User Guide, "Entry points specification"
(https://packaging.python.org/en/latest/specifications/entry-points/); Python docs,
``importlib.metadata.entry_points``.
"""

from __future__ import annotations

from collections.abc import Mapping
from functools import cache
from importlib.metadata import EntryPoint, entry_points
from typing import Any

from limitwatch.alerts.notifiers.base import Notifier, NotifierSettings

GROUP = "limitwatch.notifiers"


class UnknownNotifierError(LookupError):
    """No notifier type of that name is installed; the message lists those that are."""


class NotifierPluginError(Exception):
    """A registered notifier could not be loaded or does not keep the notifier contract."""


def _entry_points() -> dict[str, EntryPoint]:
    found: dict[str, EntryPoint] = {}
    for ep in entry_points(group=GROUP):
        other = found.get(ep.name)
        if other is not None and other.value != ep.value:
            raise NotifierPluginError(
                f"two installed packages register a notifier type {ep.name!r} ({other.value} and "
                f"{ep.value}); uninstall one of them."
            )
        found[ep.name] = ep
    return found


def known_types() -> list[str]:
    """Names of every installed notifier type, sorted; nothing is imported."""
    return sorted(_entry_points())


@cache
def notifier_class(type_name: str) -> type[Notifier]:
    """The class registered as ``type_name``, imported on first use.

    Raises :class:`UnknownNotifierError` naming the installed types, or
    :class:`NotifierPluginError` when the plugin fails to import or is not a proper notifier.
    """
    eps = _entry_points()
    ep = eps.get(type_name)
    if ep is None:
        raise UnknownNotifierError(
            f"unknown notifier type {type_name!r}; installed types are: "
            f"{', '.join(sorted(eps)) or '(none)'}"
        )
    try:
        cls = ep.load()
    except Exception as exc:
        raise NotifierPluginError(
            f"notifier type {type_name!r} ({ep.value}) could not be loaded: {exc}"
        ) from exc
    if not (isinstance(cls, type) and issubclass(cls, Notifier)):
        raise NotifierPluginError(
            f"notifier type {type_name!r} ({ep.value}) is not a subclass of "
            "limitwatch.alerts.notifiers.base.Notifier"
        )
    settings = getattr(cls, "Settings", None)
    if not (isinstance(settings, type) and issubclass(settings, NotifierSettings)):
        raise NotifierPluginError(
            f"notifier type {type_name!r} ({ep.value}) has no Settings model derived from "
            "NotifierSettings"
        )
    declared = settings.model_fields["type"].annotation
    if getattr(declared, "__args__", None) != (type_name,):
        raise NotifierPluginError(
            f"notifier type {type_name!r} ({ep.value}): its Settings.type must be "
            f'Literal["{type_name}"], the name it is registered under'
        )
    return cls


def settings_model(type_name: str) -> type[NotifierSettings]:
    """The pydantic model that validates a ``[[notifiers]]`` table of this type."""
    return notifier_class(type_name).Settings


def validate_settings(raw: Mapping[str, Any]) -> NotifierSettings:
    """Validate one raw notifier table without building the notifier (no secrets are read).

    pydantic's ``ValidationError`` passes through unchanged so the caller can name the key path.
    """
    type_name = raw.get("type")
    if not isinstance(type_name, str):
        raise UnknownNotifierError(
            f"a notifier needs a 'type' naming what kind it is; installed types are: "
            f"{', '.join(known_types()) or '(none)'}"
        )
    return settings_model(type_name).model_validate(dict(raw))


def build_notifier(raw: Mapping[str, Any]) -> Notifier:
    """Validate ``raw`` and build the notifier it describes (reading its secrets now)."""
    settings = validate_settings(raw)
    return notifier_class(settings.type).from_settings(settings)
