"""Notifiers: the channels that carry a notification to people and systems.

Each channel is a :class:`~limitwatch.alerts.notifiers.base.Notifier` registered under the
``limitwatch.notifiers`` entry-point group; :mod:`.registry` finds them by type name and imports a
channel's module only when it is first used, so importing this package imports no client library.

>>> from limitwatch.alerts.notifiers import build_notifier
>>> build_notifier({"type": "console", "name": "desk"})
<ConsoleNotifier 'desk'>
"""

from limitwatch.alerts.notifiers.base import DeliveryError, Notifier, NotifierSettings
from limitwatch.alerts.notifiers.registry import (
    NotifierPluginError,
    UnknownNotifierError,
    build_notifier,
    known_types,
    notifier_class,
    settings_model,
    validate_settings,
)

__all__ = [
    "DeliveryError",
    "Notifier",
    "NotifierPluginError",
    "NotifierSettings",
    "UnknownNotifierError",
    "build_notifier",
    "known_types",
    "notifier_class",
    "settings_model",
    "validate_settings",
]
