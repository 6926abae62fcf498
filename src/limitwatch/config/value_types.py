"""Value types of config keys: durations, bounded numbers, paths, names, globs.

Why bounded: a key written by hand at night can be off by a factor of a thousand; an interval of
years is a slip the scheduler cannot even plan, so each type says what it takes and refuses the
rest with a message that names the limit.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, BeforeValidator, ConfigDict, Field, ValidationInfo

from limitwatch.durations import format_duration, parse_duration
from limitwatch.ingest.fields import field_path
from limitwatch.stats.rules import RULE_IDS

# --------------------------------------------------------------------------- value types


MAX_DURATION = 366 * 86400.0
"""The longest interval, timeout or cadence a key takes (366 days) unless it says otherwise: a
longer one is a slip, and the scheduler cannot even add some of them to today's date."""
MAX_RETENTION = 100 * 366 * 86400.0
"""``keep_readings_for`` may be up to a century."""
MIN_DURATION = 0.001
"""The shortest positive duration (1 ms); the scheduler counts in microseconds and a zero
interval would spin."""
MAX_COUNT = 100_000
"""The largest reading count a stream option takes (``learn_count`` and friends): the learning
phase holds its readings in memory."""


def _bounded(seconds: float, high: float = MAX_DURATION) -> float:
    if seconds > high:
        raise ValueError(
            f"{format_duration(seconds) if seconds < 10 * high else f'{seconds:g} s'} is too long; "
            f"at most {format_duration(high)}"
        )
    return seconds


def _duration(value: Any) -> float:
    return parse_duration(value)


def _positive(seconds: float) -> float:
    if seconds <= 0:
        raise ValueError("must be longer than zero")
    if seconds < MIN_DURATION:
        raise ValueError("must be at least 1ms")
    return _bounded(seconds)


def _retention(seconds: float) -> float:
    if seconds <= 0:
        raise ValueError("must be longer than zero")
    return _bounded(seconds, MAX_RETENTION)


def _off_or_duration(value: Any) -> float | None:
    if value is None or value is False or (isinstance(value, str) and value.strip() == "off"):
        return None
    return _positive(parse_duration(value))


def _cadences(value: Any) -> Any:
    """``stale_after`` counts cadences while its neighbours are durations: say so when it is
    given a duration."""
    if isinstance(value, str) and re.search(r"[a-z]", value.strip()):
        raise ValueError(
            f"{value!r} is a duration, but stale_after counts cadences: a number such as 5 "
            "means five times the stream's cadence without a reading (with cadence = \"1m\", "
            "write 10 for ten minutes)"
        )
    return value


Duration = Annotated[float, BeforeValidator(_duration)]
PositiveDuration = Annotated[float, BeforeValidator(_duration), AfterValidator(_positive)]
"""At least 1 ms and at most :data:`MAX_DURATION`."""
RetentionDuration = Annotated[float, BeforeValidator(_duration), AfterValidator(_retention)]
OffDuration = Annotated[float | None, BeforeValidator(_off_or_duration)]
"""A positive duration (as :data:`PositiveDuration`), or ``"off"``."""


def _resolve_path(value: Path, info: ValidationInfo) -> Path:
    base = (info.context or {}).get("base_dir")
    if "\0" in str(value):
        raise ValueError("a path cannot contain a NUL character")
    try:
        value = value.expanduser()
    except RuntimeError:  # "~name" with no such user, or no home directory at all
        raise ValueError(
            f"{str(value)!r} starts with ~ but that home folder is unknown on this machine; "
            "write the full path"
        ) from None
    return value if base is None or value.is_absolute() else Path(base) / value


ConfigPath = Annotated[Path, AfterValidator(_resolve_path)]

_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9 _.@:-]*")


def _name(value: str) -> str:
    if not _NAME.fullmatch(value) or len(value) > 100:
        raise ValueError(
            f"{value!r} is not a usable name; start with a letter or digit and use letters, "
            "digits, spaces and _ . @ : - (at most 100 characters)"
        )
    return value


Name = Annotated[str, AfterValidator(_name)]


def _glob(value: str) -> str:
    if not value.strip():
        raise ValueError("an empty glob matches nothing; write e.g. 'pack-*/downtime' or '*'")
    return value


Glob = Annotated[str, AfterValidator(_glob)]
"""A shell-style pattern on stream ids (``*``, ``?``, ``[abc]``), case-sensitive."""

_ENV_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def _env_name(value: str) -> str:
    if not _ENV_NAME.fullmatch(value):
        raise ValueError(
            f"{value!r} is not an environment variable name (letters, digits and _, "
            "not starting with a digit)"
        )
    return value


EnvName = Annotated[str, AfterValidator(_env_name)]


def _field_path(value: str) -> str:
    field_path(value)
    return value


FieldPath = Annotated[str, AfterValidator(_field_path)]

Severity = Literal["info", "warning", "critical"]
TimeFormat = Literal["epoch_s", "epoch_ms", "iso8601", "auto"]
KNOWN_RULES: tuple[str, ...] = RULE_IDS
"""Rule ids an alert can carry (the rule registry's one list: every detector, plus ``stale``)."""


class _Section(BaseModel):
    model_config = ConfigDict(
        extra="forbid", frozen=True, validate_default=True, allow_inf_nan=False
    )


def _section() -> Any:
    """An absent ``[section]`` is an empty one, validated (so defaults such as relative paths
    are resolved against the config's folder)."""
    return Field(default_factory=dict, validate_default=True)

