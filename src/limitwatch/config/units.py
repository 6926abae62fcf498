"""Durations written without a unit: allowed, read as seconds, and warned about.

A bare number in a duration key counts seconds (see :mod:`limitwatch.durations`), so
``batch_wait = 50`` is fifty seconds, where its neighbours' ``"200ms"`` suggest fifty
milliseconds was meant. Refusing bare numbers would break configs that work; instead ``check``
and ``serve`` name every duration key written without a unit and say what it is read as.

The raw TOML is read again because the validated config holds seconds only, and which keys are
durations is read from the config models themselves (their duration validators), so a new
duration key is covered without a list to keep up to date.

>>> [w.split(";")[0] for w in bare_durations({"service": {"batch_wait": 50, "stall_after": "1m"}})]
['service.batch_wait = 50 has no unit and is read as 50 seconds']
"""

from __future__ import annotations

import re
import sys
import tomllib
import types
import typing
from collections.abc import Iterator
from functools import cache
from pathlib import Path
from typing import Any

from pydantic import BaseModel
from pydantic.functional_validators import BeforeValidator

from limitwatch import config as config_module

_PLAIN = re.compile(r"\s*(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?\s*")


def _is_duration(annotation: Any) -> bool:
    duration_validators = (config_module._duration, config_module._off_or_duration)
    if typing.get_origin(annotation) is typing.Annotated:
        return any(
            isinstance(m, BeforeValidator) and m.func in duration_validators
            for m in annotation.__metadata__
        )
    if typing.get_origin(annotation) in (typing.Union, types.UnionType):
        return any(_is_duration(arg) for arg in typing.get_args(annotation))
    return False


@cache
def duration_keys() -> frozenset[str]:
    """Names of every config key that holds a duration: in the config's own models and in
    the settings models of every installed source plugin (and the models beside them)."""
    from limitwatch.ingest.registry import SOURCES
    from limitwatch.plugins import PluginError

    spaces = [vars(config_module)]
    for kind in SOURCES.known_types():
        try:
            model = SOURCES.settings_model(kind)
        except PluginError:  # a broken plugin is reported where the config uses it
            continue
        spaces.append(vars(sys.modules[model.__module__]))
    keys = set()
    for model in (m for space in spaces for m in space.values()):
        if isinstance(model, type) and issubclass(model, BaseModel):
            for name, field in model.model_fields.items():
                annotation: Any = field.annotation
                if field.metadata:
                    annotation = typing.Annotated[annotation, *field.metadata]
                if _is_duration(annotation):
                    keys.add(name)
    return frozenset(keys)


def _walk(node: Any, where: str) -> Iterator[tuple[str, str, Any]]:
    if isinstance(node, dict):
        for key, value in node.items():
            path = f"{where}.{key}" if where else key
            yield where, key, value
            yield from _walk(value, path)
    elif isinstance(node, list):
        for i, item in enumerate(node):
            yield from _walk(item, f"{where}[{i}]")


def bare_durations(data: dict[str, Any]) -> list[str]:
    """A warning for each duration key in the raw TOML ``data`` written without a unit."""
    keys = duration_keys()
    out = []
    for where, key, value in _walk(data, ""):
        if key not in keys or isinstance(value, bool):
            continue
        plain = isinstance(value, int | float) or (
            isinstance(value, str) and _PLAIN.fullmatch(value)
        )
        if not plain or float(value) == 0:
            continue
        path = f"{where}.{key}" if where else key
        shown = value if isinstance(value, int | float) else f'"{value}"'
        number = str(value).strip()
        out.append(
            f"{path} = {shown} has no unit and is read as {number} seconds; write "
            f'"{number}s" if that is meant (or e.g. "{number}ms")'
        )
    return out


def bare_durations_in(path: str | Path) -> list[str]:
    """:func:`bare_durations` of a config file (that has been loaded successfully already)."""
    try:
        return bare_durations(tomllib.loads(Path(path).read_text(encoding="utf-8")))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError):
        return []
