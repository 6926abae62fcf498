"""Problems in a config, each at its key path, and pydantic's errors said in our words.

Why here, apart from the models: every section raises through :func:`_fail` and every problem
is reported as ``sources[0].topics[1].filter: ...``, so the translation from pydantic's
locations (with their union tags) to the file's key paths is one piece of code.
"""

from __future__ import annotations

import difflib
import types
import typing
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Annotated, Any

from pydantic import BaseModel, ValidationError
from pydantic_core import InitErrorDetails, PydanticCustomError


@dataclass(frozen=True, slots=True)
class Problem:
    """One thing wrong (or worth a warning) in a config: the key path and what to do."""

    path: str
    message: str

    def __str__(self) -> str:
        return f"{self.path}: {self.message}" if self.path else self.message


class ConfigError(ValueError):
    """The configuration cannot be used. ``problems`` lists every problem found, each with its
    key path; the message shows them one per line."""

    def __init__(self, source: str, problems: Iterable[Problem]) -> None:
        self.source = source
        self.problems = list(problems)
        count = len(self.problems)
        lines = [f"{source}: {count} problem{'s' if count != 1 else ''} in the configuration:"]
        lines.extend(f"  {p}" for p in self.problems)
        super().__init__("\n".join(lines))


def _fail(*problems: tuple[tuple[str | int, ...], str]) -> ValidationError:
    """A pydantic ValidationError carrying our own messages at explicit locations (pydantic
    prefixes the location of the model or field that raises it)."""
    return ValidationError.from_exception_data(
        "Config",
        [
            InitErrorDetails(
                type=PydanticCustomError("config", "{message}", {"message": message}),
                loc=loc,
                input=None,
            )
            for loc, message in problems
        ],
    )


def _needs_type(what: str) -> str:
    return f'a {what} needs type = "..." naming what kind it is'


def _unwrap(tp: Any) -> Any:
    while True:
        origin = typing.get_origin(tp)
        if origin is Annotated:
            tp = typing.get_args(tp)[0]
            continue
        if origin in (typing.Union, types.UnionType):
            args = [a for a in typing.get_args(tp) if a is not type(None)]
            if len(args) == 1:
                tp = args[0]
                continue
        return tp


def _is_model(tp: Any) -> bool:
    return isinstance(tp, type) and issubclass(tp, BaseModel)


def _locate(
    loc: tuple[str | int, ...], root: type[BaseModel]
) -> tuple[tuple[str | int, ...], type[BaseModel] | None]:
    """Follow a pydantic location through the models: drop the union tags pydantic inserts
    (``sources.0.mqtt.port`` is ``sources[0].port`` in the file) and find the model that holds
    the last key (to list the keys it knows)."""
    kept: list[str | int] = []
    tp: Any = root
    holder: type[BaseModel] | None = None
    for item in loc:
        tp = _unwrap(tp)
        if isinstance(item, int):
            kept.append(item)
            args = typing.get_args(tp)
            tp = args[0] if typing.get_origin(tp) in (list, tuple) and args else None
            continue
        if typing.get_origin(tp) in (typing.Union, types.UnionType):
            variants = {
                typing.get_args(m.model_fields["type"].annotation)[0]: m
                for m in map(_unwrap, typing.get_args(tp))
                if _is_model(m) and "type" in m.model_fields
            }
            if item in variants:
                tp = variants[item]
                continue
        kept.append(item)
        if _is_model(tp):
            holder = tp
            field = tp.model_fields.get(item)
            tp = None if field is None else field.annotation
        elif typing.get_origin(tp) is dict:
            holder, tp = None, typing.get_args(tp)[1]
        else:
            holder, tp = None, None
    return tuple(kept), holder


def key_path(loc: Iterable[str | int]) -> str:
    """``("sources", 0, "topics", 1, "filter")`` -> ``sources[0].topics[1].filter``."""
    path = ""
    for item in loc:
        path += f"[{item}]" if isinstance(item, int) else (f".{item}" if path else str(item))
    return path


_PLAIN = {
    "model_type": "should be a table",
    "model_attributes_type": "should be a table",
    "dict_type": "should be a table",
    "list_type": "should be an array",
    "string_type": "should be text (in quotes)",
    "bool_type": "should be true or false",
    "bool_parsing": "should be true or false",
    "int_type": "should be a whole number",
    "int_parsing": "should be a whole number",
    "int_from_float": "should be a whole number",
    "float_type": "should be a number",
    "float_parsing": "should be a number",
    "finite_number": "should be a finite number",
    "path_type": "should be a file path (text in quotes)",
}


def _show(value: Any) -> str:
    if isinstance(value, Mapping):
        return "a table"
    if isinstance(value, list):
        return "an array"
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _describe(error: Mapping[str, Any], holder: type[BaseModel] | None, key: Any) -> str:
    kind = error["type"]
    message = str(error["msg"])
    if kind == "config":
        return message
    if kind == "extra_forbidden":
        known = list(holder.model_fields) if holder is not None else []
        close = difflib.get_close_matches(str(key), known, n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        listing = f"; keys here: {', '.join(known)}" if known else ""
        return f"unknown key{hint}{listing}"
    if kind == "missing":
        return "is required"
    if kind == "union_tag_invalid":
        ctx = error.get("ctx") or {}
        return f"unknown type {ctx.get('tag')!r}; types: {ctx.get('expected_tags')}"
    if kind == "union_tag_not_found":
        return _needs_type("source")
    if kind in ("value_error", "assertion_error"):
        return message.split(", ", 1)[1] if ", " in message else message
    if kind in _PLAIN:
        return f"{_PLAIN[kind]}, not {_show(error.get('input'))}"
    if message.startswith("Input should"):
        message = "should" + message[len("Input should") :]
    elif message.startswith(("List should", "String should", "Value should")):
        message = "should" + message.split(" should", 1)[1]
    if kind in ("too_short", "too_long"):
        return message.replace(" after validation", "").replace("item", "entry")
    return f"{message}, not {_show(error.get('input'))}"


def _as_problems(
    exc: ValidationError, root: type[BaseModel]
) -> list[tuple[tuple[str | int, ...], str]]:
    """pydantic's errors as (location, our message) pairs, union tags dropped from locations."""
    out = []
    for error in exc.errors(include_url=False):
        loc, holder = _locate(tuple(error["loc"]), root)
        out.append((loc, _describe(error, holder, loc[-1] if loc else None)))
    return out

