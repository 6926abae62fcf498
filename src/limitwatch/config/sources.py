"""What every ``[[sources]]`` entry has, and the union of the source plugins' settings.

Why a union built at run time: the config knows no source by name. Each entry's ``type`` picks
a plugin from the ``limitwatch.sources`` entry-point group, and only the plugins the file uses
are imported; their settings models derive from :class:`SourceSettings`.
"""

from __future__ import annotations

import typing
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any

from pydantic import Field, TypeAdapter, ValidationError, model_validator

from limitwatch.config.errors import Problem, _as_problems, _fail, _needs_type, _show
from limitwatch.config.secret_keys import SecretRef
from limitwatch.config.value_types import ConfigPath, Name, _Section


class TlsSettings(_Section):
    """``[sources.tls]``: TLS to the broker. Without ``ca_file`` the system's CA store is used."""

    ca_file: ConfigPath | None = None
    cert_file: ConfigPath | None = None
    key_file: ConfigPath | None = None

    @model_validator(mode="after")
    def _pair(self) -> TlsSettings:
        if self.key_file is not None and self.cert_file is None:
            raise _fail((("cert_file",), "key_file needs the client certificate in cert_file"))
        return self


class SourceSettings(_Section):
    """What every ``[[sources]]`` entry has. A source plugin's ``Settings`` derives from this,
    with ``type: Literal["<its entry-point name>"]`` and its own keys; unknown keys are refused
    as everywhere else. The hooks below let ``check`` and the config's advice cover a source
    without knowing it: each gets the entry's key path (``sources[2]``)."""

    type: str
    name: Name
    max_streams: int = Field(10_000, ge=1)
    """Most streams this source may feed; readings for further new streams are refused."""

    def secret_refs(self, where: str) -> list[SecretRef]:
        """Secrets this entry points at (read at start and by ``check``)."""
        return []

    def files_needed(self, where: str) -> list[tuple[str, Path]]:
        """Files that must exist (certificates, CA files), each with its key path."""
        return []

    def advice(self, where: str) -> list[Problem]:
        """Things allowed but probably not meant; ``check`` prints them as warnings."""
        return []

    def describe(self) -> str:
        """One line for ``check``'s summary."""
        return f"{self.name} ({self.type})"


def source_settings(entries: Any, context: Any) -> Any:
    """Each ``[[sources]]`` entry by the settings model of the source plugin its ``type``
    names: a discriminated union of the types the file uses, so only their plugins are
    imported. ``context`` is the validation context (``base_dir`` for relative paths)."""
    from limitwatch.ingest.registry import SOURCES
    from limitwatch.plugins import PluginError, UnknownPluginError

    if not isinstance(entries, list):
        return entries  # pydantic says what it should be
    problems: list[tuple[tuple[str | int, ...], str]] = []
    models: dict[str, type[SourceSettings]] = {}
    usable: list[tuple[int, Mapping[str, Any]]] = []
    for i, raw in enumerate(entries):
        if not isinstance(raw, Mapping):
            problems.append(((i,), f"should be a table, not {_show(raw)}"))
            continue
        kind = raw.get("type")
        if not isinstance(kind, str):
            problems.append(((i, "type"), _needs_type("source")))
            continue
        try:
            models[kind] = SOURCES.settings_model(kind)
        except (UnknownPluginError, PluginError) as exc:
            problems.append(((i, "type"), str(exc)))
            continue
        usable.append((i, raw))
    chosen: list[SourceSettings] = []
    if models:
        union: Any = (
            next(iter(models.values()))
            if len(models) == 1
            else Annotated[
                typing.Union[tuple(models.values())],  # noqa: UP007 -- built at run time
                Field(discriminator="type"),
            ]
        )
        adapter: TypeAdapter[Any] = TypeAdapter(union)
        for i, raw in usable:
            try:
                chosen.append(adapter.validate_python(dict(raw), context=context))
            except ValidationError as exc:
                problems.extend(((i, *loc), msg) for loc, msg in _as_problems(exc, union))
    if problems:
        raise _fail(*problems)
    return chosen
