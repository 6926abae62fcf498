"""The service's TOML configuration: pydantic models, and errors that name the key to fix.

Why so strict: a config file is edited by hand, often at night, by someone who is not the
person who wrote it. Every table refuses unknown keys (a misspelt option is an error, never a
silently ignored line), every problem in the file is reported at once, each by its key path
(``sources[0].topics[1].filter: ...``), and secrets are never accepted inline.

Sections (``config/example.toml`` documents every key):

``[store]``
    where the SQLite file lives and how long readings are kept.
``[service]``
    batching, the metrics/health listener, how often stale streams are looked for.
``[defaults]`` and ``[[streams]]``
    how streams are watched. Each ``[[streams]]`` entry has a ``match`` glob on the stream id;
    the first entry that matches wins and the keys it leaves out come from ``[defaults]``.
``[alerts]`` and ``[[alerts.severity]]``
    the alert lifecycle (:class:`~limitwatch.alerts.lifecycle.AlertPolicy`).
``[[sources]]``
    ``type`` picks a source plugin (``mqtt``, ``file``, or one registered in the
    ``limitwatch.sources`` entry-point group); its keys are checked by that plugin's settings
    model, a subclass of :class:`SourceSettings`.
``[[notifiers]]``
    ``type`` picks a notifier plugin; its keys are checked by that plugin's settings model.
``[[routes]]``
    which notifiers hear about which streams and severities. Every matching route applies;
    with no routes at all, every notifier hears the default kinds of notice (not escalations).
``[budget]``
    the false-alarm budget the planner works to.

Relative paths (the store, TLS files, secret files, file-source globs, and any ``*_file`` key of
a notifier) are taken relative to the folder of the config file, so a config can be moved
together with what it names.

>>> config = config_from_dict({
...     "defaults": {"rules": "limits", "learn_count": 20},
...     "streams": [{"match": "pack-*/downtime", "lower_bound": 0, "cadence": "8h"}],
... })
>>> pack = config.stream_settings("pack-2/downtime")
>>> pack.rules, pack.learn_count, pack.lower_bound, pack.stale_after_s
('limits', 20, 0.0, 144000.0)
>>> try:
...     config_from_dict({"streams": [{"match": "x", "rules": "limits, trnd"}]})
... except ConfigError as exc:
...     print(exc.problems[0].path)
streams[0].rules

Layout: ``value_types`` (durations, bounded numbers, paths, names), ``sections`` (``[store]``,
``[service]``, ``[alerts]``, ``[[routes]]``, ``[budget]``), ``streams`` (``[defaults]`` and
``[[streams]]``), ``sources`` (:class:`SourceSettings` and the union of the source plugins'
settings), ``secret_keys`` (no secrets inline), ``references`` (names and cross-references),
``errors`` (problems by key path), ``model`` (:class:`Config`), ``loading`` and ``advice``
(warnings, secrets and files for ``check``); ``units`` finds duration keys written without a
unit. Callers import from ``limitwatch.config``.

References
----------
TOML v1.0.0 specification (https://toml.io/en/v1.0.0); pydantic v2 documentation, "Unions:
discriminated unions" and "Validation errors"; OASIS MQTT 3.1.1 (2014) and MQTT 5.0 (2019)
for the broker settings.
"""

from __future__ import annotations

from typing import Any

from limitwatch.config.advice import check_files, check_secrets
from limitwatch.config.advice import config_warnings as config_warnings
from limitwatch.config.errors import _PLAIN as _PLAIN
from limitwatch.config.errors import ConfigError, Problem, key_path
from limitwatch.config.errors import _as_problems as _as_problems
from limitwatch.config.errors import _describe as _describe
from limitwatch.config.errors import _fail as _fail
from limitwatch.config.errors import _is_model as _is_model
from limitwatch.config.errors import _locate as _locate
from limitwatch.config.errors import _needs_type as _needs_type
from limitwatch.config.errors import _show as _show
from limitwatch.config.errors import _unwrap as _unwrap
from limitwatch.config.loading import _TOML_POSITION as _TOML_POSITION
from limitwatch.config.loading import _TOO_DEEP as _TOO_DEEP
from limitwatch.config.loading import _problems as _problems
from limitwatch.config.loading import config_from_dict, load_config
from limitwatch.config.model import Config
from limitwatch.config.references import _reference_problems as _reference_problems
from limitwatch.config.secret_keys import _SECRET_KEY as _SECRET_KEY
from limitwatch.config.secret_keys import SecretRef
from limitwatch.config.secret_keys import _inline_secrets as _inline_secrets
from limitwatch.config.secret_keys import _without as _without
from limitwatch.config.sections import _POLICY as _POLICY
from limitwatch.config.sections import (
    AlertsSection,
    BudgetSection,
    Route,
    ServiceSection,
    SeverityEntry,
    StoreSection,
    split_address,
)
from limitwatch.config.sources import SourceSettings, TlsSettings
from limitwatch.config.sources import source_settings as source_settings
from limitwatch.config.streams import _MONITOR as _MONITOR
from limitwatch.config.streams import BaselineInput, StreamConfig, StreamEntry, StreamOptions
from limitwatch.config.streams import _merged_problems as _merged_problems
from limitwatch.config.value_types import _ENV_NAME as _ENV_NAME
from limitwatch.config.value_types import _NAME as _NAME
from limitwatch.config.value_types import KNOWN_RULES as KNOWN_RULES
from limitwatch.config.value_types import MAX_COUNT as MAX_COUNT
from limitwatch.config.value_types import MAX_DURATION as MAX_DURATION
from limitwatch.config.value_types import MAX_RETENTION as MAX_RETENTION
from limitwatch.config.value_types import MIN_DURATION as MIN_DURATION
from limitwatch.config.value_types import ConfigPath as ConfigPath
from limitwatch.config.value_types import Duration as Duration
from limitwatch.config.value_types import EnvName as EnvName
from limitwatch.config.value_types import FieldPath as FieldPath
from limitwatch.config.value_types import Glob as Glob
from limitwatch.config.value_types import Name as Name
from limitwatch.config.value_types import OffDuration as OffDuration
from limitwatch.config.value_types import PositiveDuration as PositiveDuration
from limitwatch.config.value_types import RetentionDuration as RetentionDuration
from limitwatch.config.value_types import Severity as Severity
from limitwatch.config.value_types import TimeFormat as TimeFormat
from limitwatch.config.value_types import _bounded as _bounded
from limitwatch.config.value_types import _cadences as _cadences
from limitwatch.config.value_types import _duration as _duration
from limitwatch.config.value_types import _env_name as _env_name
from limitwatch.config.value_types import _field_path as _field_path
from limitwatch.config.value_types import _glob as _glob
from limitwatch.config.value_types import _name as _name
from limitwatch.config.value_types import _off_or_duration as _off_or_duration
from limitwatch.config.value_types import _positive as _positive
from limitwatch.config.value_types import _resolve_path as _resolve_path
from limitwatch.config.value_types import _retention as _retention
from limitwatch.config.value_types import _Section as _Section
from limitwatch.config.value_types import _section as _section

__all__ = [
    "AlertsSection",
    "BaselineInput",
    "BudgetSection",
    "Config",
    "ConfigError",
    "Problem",
    "Route",
    "SecretRef",
    "ServiceSection",
    "SeverityEntry",
    "SourceSettings",
    "StoreSection",
    "StreamConfig",
    "StreamEntry",
    "StreamOptions",
    "TlsSettings",
    "check_files",
    "check_secrets",
    "config_from_dict",
    "key_path",
    "load_config",
    "split_address",
]


_MOVED = {
    "MqttSourceConfig": "limitwatch.ingest.mqtt.settings",
    "MqttTopic": "limitwatch.ingest.mqtt.settings",
    "FileSourceConfig": "limitwatch.ingest.files.settings",
}
"""Settings models that moved to their source plugins' packages; still importable from here.
(Imported on first use: those modules build on this one.)"""


def __getattr__(name: str) -> Any:
    module = _MOVED.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    import importlib

    return getattr(importlib.import_module(module), name)
