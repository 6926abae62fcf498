"""Reading a config: TOML from a file or an already parsed table, every problem at once.

Why every problem at once: a config is edited by hand, and fixing one error per run of
``check`` wastes a night. Problems come sorted by the file's sections, each once.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from limitwatch.config.errors import ConfigError, Problem, _as_problems, key_path
from limitwatch.config.model import Config


def _problems(exc: ValidationError) -> list[Problem]:
    """Every problem once, in the order of the file's sections (then of their entries)."""
    order = {name: i for i, name in enumerate(Config.model_fields)}

    def place(item: tuple[tuple[str | int, ...], str]) -> tuple[int, int]:
        loc = item[0]
        section = order.get(str(loc[0]), len(order)) if loc else -1
        entry = loc[1] if len(loc) > 1 and isinstance(loc[1], int) else -1
        return section, entry

    problems: list[Problem] = []
    for loc, message in sorted(_as_problems(exc, Config), key=place):
        problem = Problem(key_path(loc), message)
        if problem not in problems:
            problems.append(problem)
    return problems


def config_from_dict(
    data: Mapping[str, Any], *, base_dir: Path | None = None, source: str = "<config>"
) -> Config:
    """Validate an already parsed config; relative paths resolve against ``base_dir``."""
    try:
        return Config.model_validate(
            dict(data), context={"base_dir": None if base_dir is None else Path(base_dir)}
        )
    except ValidationError as exc:
        raise ConfigError(source, _problems(exc)) from None
    except RecursionError:
        raise ConfigError(source, [Problem("", _TOO_DEEP)]) from None


_TOO_DEEP = "is nested too deeply (arrays or tables inside each other hundreds of levels down)"


_TOML_POSITION = re.compile(r"\s*\(at line (\d+), column (\d+)\)$")


def load_config(path: str | Path) -> Config:
    """Read and validate the TOML file at ``path``; :class:`ConfigError` lists every problem."""
    file = Path(path)
    name = str(path)
    try:
        raw = file.read_bytes()
    except FileNotFoundError:
        raise ConfigError(name, [Problem("", "no such file")]) from None
    except IsADirectoryError:
        raise ConfigError(name, [Problem("", "is a folder, not a config file")]) from None
    except OSError as exc:
        raise ConfigError(name, [Problem("", f"cannot be read: {exc.strerror}")]) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(
            name, [Problem("", f"is not UTF-8 text (byte {exc.start}); TOML files are UTF-8")]
        ) from None
    try:
        data = tomllib.loads(text)
    except RecursionError:
        raise ConfigError(name, [Problem("", f"not usable TOML: it {_TOO_DEEP}")]) from None
    except tomllib.TOMLDecodeError as exc:
        message = str(exc)
        match = _TOML_POSITION.search(message)
        if match is not None:
            what = message[: match.start()]
            what = what[:1].lower() + what[1:]
            message = f"line {match.group(1)}, column {match.group(2)}: {what}"
        raise ConfigError(name, [Problem("", f"not valid TOML: {message}")]) from None
    config = config_from_dict(data, base_dir=file.resolve().parent, source=name)
    config._path = file
    return config
