"""Find source classes by type name, built-in or third-party, without importing them all.

The loading is :mod:`limitwatch.plugins`, shared with the notifiers. A third-party package
registers a source in its own ``pyproject.toml``::

    [project.entry-points."limitwatch.sources"]
    historian = "plant_historian.limitwatch:HistorianSource"

>>> "file" in SOURCES.known_types() and "mqtt" in SOURCES.known_types()
True
>>> SOURCES.settings_model("file").__name__
'FileSourceConfig'
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from limitwatch.config import SourceSettings
from limitwatch.ingest.base import Source, SourceContext
from limitwatch.plugins import PluginKind

GROUP = "limitwatch.sources"

SOURCES: PluginKind[Source] = PluginKind(GROUP, "source", Source, SourceSettings)
"""The shared loader set up for sources."""


def build_source(settings: SourceSettings, context: SourceContext | None = None) -> Source:
    """The source that validated ``settings`` describe (reading its secrets now)."""
    return SOURCES.load(settings.type).from_settings(settings, context or SourceContext())


def validate_source(raw: Mapping[str, Any]) -> SourceSettings:
    """One raw ``[[sources]]`` table, validated by its plugin's settings model."""
    type_name = raw.get("type")
    if not isinstance(type_name, str):
        raise SOURCES.unknown_error(type_name)
    model: type[SourceSettings] = SOURCES.settings_model(type_name)
    return model.model_validate(dict(raw))
