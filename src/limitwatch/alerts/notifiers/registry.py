"""Find notifier classes by type name, built-in or third-party, without importing them all.

The loading itself is :mod:`limitwatch.plugins`, shared with the sources.

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
from typing import Any

from limitwatch.alerts.notifiers.base import Notifier, NotifierSettings
from limitwatch.plugins import PluginError, PluginKind, UnknownPluginError

GROUP = "limitwatch.notifiers"


class UnknownNotifierError(UnknownPluginError):
    """No notifier type of that name is installed; the message lists those that are."""


class NotifierPluginError(PluginError):
    """A registered notifier could not be loaded or does not keep the notifier contract."""


NOTIFIERS: PluginKind[Notifier] = PluginKind(
    GROUP,
    "notifier",
    Notifier,
    NotifierSettings,
    unknown=UnknownNotifierError,
    broken=NotifierPluginError,
)
"""The shared loader (:mod:`limitwatch.plugins`) set up for notifiers."""


def known_types() -> list[str]:
    """Names of every installed notifier type, sorted; nothing is imported."""
    return NOTIFIERS.known_types()


def notifier_class(type_name: str) -> type[Notifier]:
    """The class registered as ``type_name``, imported on first use.

    Raises :class:`UnknownNotifierError` naming the installed types, or
    :class:`NotifierPluginError` when the plugin fails to import or is not a proper notifier.
    """
    return NOTIFIERS.load(type_name)


def settings_model(type_name: str) -> type[NotifierSettings]:
    """The pydantic model that validates a ``[[notifiers]]`` table of this type."""
    return notifier_class(type_name).Settings


def validate_settings(raw: Mapping[str, Any]) -> NotifierSettings:
    """Validate one raw notifier table without building the notifier (no secrets are read).

    pydantic's ``ValidationError`` passes through unchanged so the caller can name the key path.
    """
    type_name = raw.get("type")
    if not isinstance(type_name, str):
        raise NOTIFIERS.unknown_error(type_name)
    return settings_model(type_name).model_validate(dict(raw))


def build_notifier(raw: Mapping[str, Any]) -> Notifier:
    """Validate ``raw`` and build the notifier it describes (reading its secrets now)."""
    settings = validate_settings(raw)
    return notifier_class(settings.type).from_settings(settings)
