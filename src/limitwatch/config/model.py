"""The whole configuration file: its sections, the checks that span entries, and the
options in force for a stream, an alert and a route.

Why one model: a stream's options, its alert severity and its notifiers come from several
sections at once; :class:`Config` answers those questions so no caller merges sections itself.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from fnmatch import translate
from pathlib import Path
from typing import Any

from pydantic import PrivateAttr, ValidationError, ValidationInfo, field_validator, model_validator

from limitwatch.alerts.lifecycle import DEFAULT_NOTICES, AlertPolicy, NoticeKind, SeverityRule
from limitwatch.alerts.messages import StreamInfo
from limitwatch.config.advice import config_warnings
from limitwatch.config.errors import Problem, _as_problems, _fail, _needs_type
from limitwatch.config.references import _reference_problems
from limitwatch.config.secret_keys import _SECRET_KEY, SecretRef, _inline_secrets, _without
from limitwatch.config.sections import (
    AlertsSection,
    BudgetSection,
    Route,
    ServiceSection,
    StoreSection,
)
from limitwatch.config.sources import SourceSettings, source_settings
from limitwatch.config.streams import StreamConfig, StreamEntry, StreamOptions, _merged_problems
from limitwatch.config.value_types import _resolve_path, _Section, _section


class Config(_Section):
    """The whole configuration file. Build with :func:`load_config`."""

    store: StoreSection = _section()
    service: ServiceSection = _section()
    defaults: StreamOptions = _section()
    streams: list[StreamEntry] = []
    alerts: AlertsSection = _section()
    sources: list[SourceSettings] = []
    notifiers: list[dict[str, Any]] = []
    routes: list[Route] = []
    budget: BudgetSection = _section()
    bridge: Any = None
    """``[bridge]`` for ``limitwatch bridge`` (MQTT -> Kafka), validated by its own model
    (:mod:`limitwatch.ingest.kafka.bridge_settings`), imported only when the file has one."""

    _path: Path | None = PrivateAttr(default=None)
    _resolved: tuple[tuple[Any, StreamConfig], ...] | None = PrivateAttr(default=None)

    # ---- validation that spans entries

    @model_validator(mode="wrap")
    @classmethod
    def _whole(cls, data: Any, handler: Any) -> Config:
        """Refuse inline secrets and cross-references that do not resolve, and report them
        together with every per-key problem."""
        extra: list[tuple[tuple[str | int, ...], str]] = []
        if isinstance(data, Mapping):
            secrets = _inline_secrets(data)
            for loc, _ in secrets:
                data = _without(data, loc)
            extra = secrets + _reference_problems(data)
        try:
            model = handler(data)
        except ValidationError as exc:
            if not extra:
                raise
            raise _fail(*_as_problems(exc, Config), *extra) from None
        if extra:
            raise _fail(*extra)
        return model

    @field_validator("sources", mode="before")
    @classmethod
    def _sources(cls, entries: Any, info: ValidationInfo) -> Any:
        return source_settings(entries, info.context)

    @field_validator("bridge", mode="before")
    @classmethod
    def _bridge(cls, value: Any, info: ValidationInfo) -> Any:
        if value is None:
            return None
        from limitwatch.ingest.kafka.bridge_settings import BridgeSettings

        try:
            return BridgeSettings.model_validate(value, context=info.context)
        except ValidationError as exc:
            raise _fail(*_as_problems(exc, BridgeSettings)) from None

    @field_validator("notifiers")
    @classmethod
    def _notifiers(
        cls, entries: list[dict[str, Any]], info: ValidationInfo
    ) -> list[dict[str, Any]]:
        from limitwatch.alerts.notifiers.registry import (
            NotifierPluginError,
            UnknownNotifierError,
            settings_model,
        )

        problems: list[tuple[tuple[str | int, ...], str]] = []
        resolved: list[dict[str, Any]] = []
        for i, raw in enumerate(entries):
            entry: dict[str, Any] = {}
            for k, v in raw.items():
                if isinstance(k, str) and k.endswith("_file") and isinstance(v, str):
                    try:
                        v = str(_resolve_path(Path(v), info))
                    except ValueError as exc:
                        problems.append(((i, k), str(exc)))
                entry[k] = v
            resolved.append(entry)
            kind = entry.get("type")
            if not isinstance(kind, str):
                problems.append(((i, "type"), _needs_type("notifier")))
                continue
            try:
                model = settings_model(kind)
            except UnknownNotifierError as exc:
                problems.append(((i, "type"), str(exc)))
                continue
            except NotifierPluginError as exc:
                problems.append(((i, "type"), str(exc)))
                continue
            try:
                model.model_validate(entry)
            except ValidationError as exc:
                problems.extend(((i, *loc), msg) for loc, msg in _as_problems(exc, model))
        if problems:
            raise _fail(*problems)
        return resolved

    @model_validator(mode="after")
    def _streams_merged(self) -> Config:
        problems: list[tuple[tuple[str | int, ...], str]] = []
        for loc, message, _ in _merged_problems(self._defaults()):
            problems.append((("defaults", *loc), message))
        for i, (_, merged) in enumerate(self._entries()):
            if merged.entry is None:
                continue
            entry = self.streams[i]
            if "stale_after" in entry.model_fields_set and merged.cadence is None:
                problems.append(
                    (("streams", i, "stale_after"), "counts in cadences; set cadence as well")
                )
            for loc, message, keys in _merged_problems(merged):
                if keys & entry.model_fields_set:
                    problems.append((("streams", i, *loc), message))
        if problems:
            raise _fail(*problems)
        return self

    # ---- streams

    def _defaults(self) -> StreamConfig:
        return StreamConfig.model_construct(
            **{k: getattr(self.defaults, k) for k in StreamOptions.model_fields},
            match=None,
            entry=None,
        )

    def _entries(self) -> tuple[tuple[Any, StreamConfig], ...]:
        if self._resolved is None:
            base = {k: getattr(self.defaults, k) for k in StreamOptions.model_fields}
            resolved: list[tuple[Any, StreamConfig]] = []
            for i, entry in enumerate(self.streams):
                values = dict(base)
                values.update(
                    {k: getattr(entry, k) for k in entry.model_fields_set if k != "match"}
                )
                merged = StreamConfig.model_construct(**values, match=entry.match, entry=i)
                resolved.append((re.compile(translate(entry.match)).match, merged))
            resolved.append((lambda _s: True, self._defaults()))
            self._resolved = tuple(resolved)
        return self._resolved

    def default_settings(self) -> StreamConfig:
        """``[defaults]`` alone: what a stream no ``[[streams]]`` entry matches gets."""
        return self._entries()[-1][1]

    def entry_settings(self, index: int) -> StreamConfig:
        """The options of ``[[streams]]`` entry ``index``, merged over ``[defaults]``."""
        return self._entries()[: len(self.streams)][index][1]

    def stream_settings(self, stream_id: str) -> StreamConfig:
        """The options for ``stream_id``: the first ``[[streams]]`` entry whose ``match`` glob
        fits (keys it leaves out from ``[defaults]``), else ``[defaults]``."""
        for matches, merged in self._entries():
            if matches(stream_id):
                return merged
        raise AssertionError("unreachable: the defaults match every stream")

    # ---- alerts and routes

    def alert_policy(self) -> AlertPolicy:
        """The lifecycle policy. Severity: the first ``[[alerts.severity]]`` entry that matches
        the stream and rule, then the stream's own ``severity`` (first matching ``[[streams]]``
        entry, then ``[defaults]``)."""
        severities = [SeverityRule(e.streams, e.rule, e.severity) for e in self.alerts.severity]
        severities.extend(
            SeverityRule(merged.match, None, merged.severity)
            for _, merged in self._entries()
            if merged.match is not None
        )
        return AlertPolicy(
            clear_after=self.alerts.clear_after,
            repeat_every_s=self.alerts.repeat_every,
            escalate_after_s=self.alerts.escalate_after,
            default_severity=self.defaults.severity,
            severities=tuple(severities),
            notification_ttl_s=self.alerts.give_up_after,
            targets=self.targets,
            stream_info=self.stream_info,
            flood_after=None if self.alerts.flood_after == "off" else self.alerts.flood_after,
            flood_window_s=self.alerts.flood_window,
        )

    def stream_info(self, stream: str) -> StreamInfo:
        """The stream's ``description`` and ``unit`` from its settings, for notification texts."""
        s = self.stream_settings(stream)
        return StreamInfo(s.description, s.unit)

    def targets(self, stream: str, rule: str, severity: str, kind: NoticeKind) -> tuple[str, ...]:
        """Notifier names for one notice: the ``notifiers`` of every route that covers the
        stream and severity and subscribes to the kind (``notify_on``), and for an escalation
        also its ``escalate_to``; each name once. With no routes configured, every notifier
        gets the default kinds but escalations."""
        if not self.routes:
            if kind == "escalated" or kind not in DEFAULT_NOTICES:
                return ()
            return tuple(n["name"] for n in self.notifiers)
        names: dict[str, None] = {}
        for route in self.routes:
            if route.covers(stream, severity):
                if kind in route.notify_on:
                    names.update(dict.fromkeys(route.notifiers))
                if kind == "escalated":
                    names.update(dict.fromkeys(route.escalate_to))
        return tuple(names)

    def notifier(self, name: str) -> dict[str, Any]:
        """The raw ``[[notifiers]]`` table named ``name`` (relative ``*_file`` paths resolved);
        build it with :func:`limitwatch.alerts.notifiers.registry.build_notifier`."""
        for entry in self.notifiers:
            if entry.get("name") == name:
                return dict(entry)
        raise KeyError(f"no notifier named {name!r}")

    # ---- secrets and advice

    @property
    def path(self) -> Path | None:
        """The file this config was loaded from, if any."""
        return self._path

    def secret_refs(self) -> list[SecretRef]:
        """Every secret the config points at (broker passwords, TLS client keys, notifier
        secrets), with the key path to report a problem at."""
        refs: list[SecretRef] = []
        for i, source in enumerate(self.sources):
            refs.extend(source.secret_refs(f"sources[{i}]"))
        if self.bridge is not None:
            refs.extend(self.bridge.secret_refs())
        for i, entry in enumerate(self.notifiers):
            bases = dict.fromkeys(
                key.rsplit("_", 1)[0]
                for key in entry
                if key.endswith(("_env", "_file")) and _SECRET_KEY.search(key.rsplit("_", 1)[0])
            )
            for base in bases:
                file = entry.get(f"{base}_file")
                refs += SecretRef.either(
                    f"notifiers[{i}]",
                    base,
                    entry.get(f"{base}_env"),
                    None if file is None else Path(file),
                    f"{base.replace('_', ' ')} for notifier {entry.get('name')!r}",
                )
        return refs

    def warnings(self) -> list[Problem]:
        """Things that are allowed but probably not meant; ``check`` prints them."""
        return config_warnings(self)
