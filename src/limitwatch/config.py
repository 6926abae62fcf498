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

References
----------
TOML v1.0.0 specification (https://toml.io/en/v1.0.0); pydantic v2 documentation, "Unions:
discriminated unions" and "Validation errors"; OASIS MQTT 3.1.1 (2014) and MQTT 5.0 (2019)
for the broker settings.
"""

from __future__ import annotations

import difflib
import math
import re
import tomllib
import types
import typing
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from fnmatch import fnmatchcase, translate
from functools import partial
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PrivateAttr,
    TypeAdapter,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

from limitwatch.alerts.lifecycle import (
    DEFAULT_NOTICES,
    NOTICE_KINDS,
    SEVERITIES,
    AlertPolicy,
    NoticeKind,
    SeverityRule,
)
from limitwatch.alerts.messages import StreamInfo
from limitwatch.durations import format_duration, parse_duration
from limitwatch.engine import MonitorSettings
from limitwatch.ingest.payload import field_path
from limitwatch.stats.baseline import Baseline, sigma_problem
from limitwatch.stats.constants import D2
from limitwatch.stats.rules import DETECTORS, parse_rules

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

# --------------------------------------------------------------------------- problems


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
KNOWN_RULES: tuple[str, ...] = (*sorted(DETECTORS), "stale")
"""Rule ids an alert can carry: every detector, plus ``stale`` from the stale-stream check."""


class _Section(BaseModel):
    model_config = ConfigDict(
        extra="forbid", frozen=True, validate_default=True, allow_inf_nan=False
    )


def _section() -> Any:
    """An absent ``[section]`` is an empty one, validated (so defaults such as relative paths
    are resolved against the config's folder)."""
    return Field(default_factory=dict, validate_default=True)


# --------------------------------------------------------------------------- [store] [service]


class StoreSection(_Section):
    """``[store]``: the SQLite file and retention."""

    path: ConfigPath = Path("limitwatch.db")
    keep_readings_for: RetentionDuration | None = None
    keep_readings_per_stream: int | None = Field(None, ge=1, le=1_000_000_000)
    keep_dead_letters_for: PositiveDuration = 30 * 86400.0
    """Dead letters older than this are dropped by the hourly retention job."""
    keep_dead_letters: int = Field(100_000, ge=1, le=1_000_000_000)
    """At most this many dead letters are kept (the newest)."""


class ServiceSection(_Section):
    """``[service]``: how the worker batches, the metrics and health listener, and how often
    the scheduler looks for stale streams, due reminders/escalations and adopted baselines."""

    batch_max: int = Field(500, ge=1, le=100_000)
    batch_wait: Annotated[PositiveDuration, AfterValidator(partial(_bounded, high=60.0))] = 0.2
    metrics_listen: str | None = None
    stale_check_every: PositiveDuration = 60.0
    alert_tick_every: PositiveDuration = 30.0
    refit_check_every: PositiveDuration = 60.0
    stall_after: PositiveDuration = 60.0
    """``/health`` answers 503 when the worker has not come round its loop for this long (it
    does at least twice a second when idle)."""
    future_tolerance: PositiveDuration = 300.0
    """A reading stamped later than its receive time by more than this is refused
    (``in-the-future``): senders' clocks drift a little, but one reading dated years ahead
    would make every real one look out of order and its stream never look stale."""
    notifier_failing_after: PositiveDuration = 600.0
    """``/health`` turns degraded (503) when a notifier's deliveries have failed, without one
    success, for longer than this."""

    @field_validator("metrics_listen")
    @classmethod
    def _listen(cls, value: str | None) -> str | None:
        if value is not None:
            split_address(value)
        return value

    @property
    def metrics_address(self) -> tuple[str, int] | None:
        """``(host, port)`` for the metrics and health listener, or None when it is off."""
        return None if self.metrics_listen is None else split_address(self.metrics_listen)


def split_address(text: str) -> tuple[str, int]:
    """``host:port`` or ``[IPv6 address]:port`` as ``(host, port)``, brackets removed."""
    match = re.fullmatch(r"(\[[0-9A-Fa-f:.]+\]|[^:\[\]\s]+):(\d{1,5})", text.strip())
    if match is None or not 1 <= int(match.group(2)) <= 65535:
        raise ValueError(f"{text!r} is not host:port; write e.g. '127.0.0.1:9464' or '[::1]:9464'")
    return match.group(1).strip("[]"), int(match.group(2))


# --------------------------------------------------------------------------- streams

_MONITOR = MonitorSettings()
_POLICY = AlertPolicy()


class BaselineInput(_Section):
    """A baseline typed in rather than learned: the center line and either sigma or the
    average moving range (``sigma = mr_bar / d2``)."""

    center: float
    sigma: float | None = Field(None, gt=0)
    mr_bar: float | None = Field(None, gt=0)

    @model_validator(mode="after")
    def _one_spread(self) -> BaselineInput:
        if (self.sigma is None) == (self.mr_bar is None):
            raise _fail((("sigma",), "give exactly one of sigma and mr_bar (average moving range)"))
        key = "sigma" if self.sigma is not None else "mr_bar"
        problem = sigma_problem(self.sigma_value)
        if problem is not None:
            raise _fail(((key,), problem))
        sigma = self.sigma_value
        # Readings become z = (x - center) / sigma: limits must be finite numbers apart from
        # the center, or every reading would be refused as non-finite or signal at once.
        if not math.isfinite(abs(self.center) + 10 * sigma):
            raise _fail(((key,), "is so large that the limits are not finite numbers"))
        if sigma < max(abs(self.center) * 1e-12, 1e-300):
            raise _fail(((key,), "is too small to tell the limits from the center line"))
        return self

    @property
    def sigma_value(self) -> float:
        return self.sigma if self.sigma is not None else self.mr_bar / D2  # type: ignore[operator]


class StreamOptions(_Section):
    """``[defaults]``: how a stream is watched. Defaults are :class:`MonitorSettings`'."""

    rules: str = _MONITOR.rules  # type: ignore[assignment]
    learn_count: int = Field(_MONITOR.learn_count, ge=2, le=MAX_COUNT)
    method: Literal["mean", "median"] = _MONITOR.method
    exclude_beyond: bool = _MONITOR.exclude_beyond
    max_iterations: int = Field(_MONITOR.max_iterations, ge=1, le=50)
    min_points: int = Field(_MONITOR.min_points, ge=2, le=MAX_COUNT)
    warn_points: int = Field(_MONITOR.warn_points, ge=2, le=MAX_COUNT)
    autocorrelation_threshold: float = Field(_MONITOR.autocorrelation_threshold, gt=0, le=1)
    lower_bound: float | None = None
    upper_bound: float | None = None
    spec_lower: float | None = None
    spec_upper: float | None = None
    max_gap: PositiveDuration | None = None
    cadence: PositiveDuration | None = None
    stale_after: Annotated[float, BeforeValidator(_cadences)] = Field(5.0, ge=1, le=1000)
    severity: Severity = "warning"
    baseline: BaselineInput | None = None
    description: str | None = None
    unit: str | None = None

    @field_validator("rules")
    @classmethod
    def _rules(cls, value: str) -> str:
        parse_rules(value)  # RuleSpecError is a ValueError: reported at this key
        return value


class StreamEntry(StreamOptions):
    """``[[streams]]``: options for the streams whose id matches ``match``; keys left out come
    from ``[defaults]``."""

    match: Glob


class StreamConfig(StreamOptions):
    """The options in force for one stream: its first matching ``[[streams]]`` entry over
    ``[defaults]``. ``entry`` is that entry's index (None: defaults only)."""

    match: str | None = None
    entry: int | None = None
    _monitor: MonitorSettings | None = PrivateAttr(default=None)

    @property
    def stale_after_s(self) -> float | None:
        """Seconds without a reading before the stream counts as stale (None: not checked)."""
        return None if self.cadence is None else self.cadence * self.stale_after

    def monitor_settings(self) -> MonitorSettings:
        """The engine's settings for this stream (built once, then shared: they are frozen)."""
        if self._monitor is None:
            self._monitor = MonitorSettings(
                rules=self.rules,
                learn_count=self.learn_count,
                method=self.method,
                exclude_beyond=self.exclude_beyond,
                max_iterations=self.max_iterations,
                min_points=self.min_points,
                warn_points=self.warn_points,
                autocorrelation_threshold=self.autocorrelation_threshold,
                lower_bound=self.lower_bound,
                upper_bound=self.upper_bound,
                spec_lower=self.spec_lower,
                spec_upper=self.spec_upper,
                max_gap=self.max_gap,
            )
        return self._monitor

    def typed_baseline(self) -> Baseline | None:
        """The typed-in baseline, if any, with this stream's bounds and spec limits."""
        if self.baseline is None:
            return None
        return Baseline.from_limits(
            center=self.baseline.center,
            sigma=self.baseline.sigma_value,
            method=self.method,
            lower_bound=self.lower_bound,
            upper_bound=self.upper_bound,
            spec_lower=self.spec_lower,
            spec_upper=self.spec_upper,
        )


def _merged_problems(
    opts: StreamConfig,
) -> list[tuple[tuple[str, ...], str, frozenset[str]]]:
    """Checks that need the merged options of one stream entry (or the defaults alone): each
    problem comes with the keys it involves, so an entry is blamed only for keys it sets."""
    out: list[tuple[tuple[str, ...], str, frozenset[str]]] = []
    if opts.learn_count < opts.min_points:
        out.append(
            (
                ("learn_count",),
                f"learn_count ({opts.learn_count}) is below min_points ({opts.min_points}): "
                "the learning phase could never fit a baseline",
                frozenset({"learn_count", "min_points"}),
            )
        )
    for low, high in (("lower_bound", "upper_bound"), ("spec_lower", "spec_upper")):
        a, b = getattr(opts, low), getattr(opts, high)
        if a is not None and b is not None and not a < b:
            out.append(
                ((high,), f"{high} ({b:g}) must be above {low} ({a:g})", frozenset({low, high}))
            )
    if opts.baseline is not None:
        center = opts.baseline.center
        lo, hi = opts.lower_bound, opts.upper_bound
        if (lo is not None and center < lo) or (hi is not None and center > hi):
            out.append(
                (
                    ("baseline", "center"),
                    f"center {center:g} lies outside the natural bounds (lower_bound, upper_bound)",
                    frozenset({"baseline", "lower_bound", "upper_bound"}),
                )
            )
    return out


# --------------------------------------------------------------------------- [alerts]


class SeverityEntry(_Section):
    """``[[alerts.severity]]``: the severity of alerts for matching streams (and one rule)."""

    streams: Glob = "*"
    rule: str | None = None
    severity: Severity

    @field_validator("rule")
    @classmethod
    def _known_rule(cls, value: str | None) -> str | None:
        if value is not None and value not in KNOWN_RULES:
            raise ValueError(f"unknown rule {value!r}; rules: {', '.join(KNOWN_RULES)}")
        return value


class AlertsSection(_Section):
    """``[alerts]``: the lifecycle knobs; see :class:`~limitwatch.alerts.lifecycle.AlertPolicy`."""

    clear_after: int = Field(_POLICY.clear_after, ge=1, le=MAX_COUNT)
    repeat_every: OffDuration = _POLICY.repeat_every_s
    escalate_after: OffDuration = _POLICY.escalate_after_s
    give_up_after: OffDuration = _POLICY.notification_ttl_s
    max_shelf: PositiveDuration = 7 * 86400.0
    flood_after: Annotated[int, Field(ge=1)] | Literal["off"] = 10
    flood_window: PositiveDuration = _POLICY.flood_window_s
    severity: list[SeverityEntry] = []


# --------------------------------------------------------------------------- [[sources]]


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


# --------------------------------------------------------------------------- [[routes]] [budget]


class Route(_Section):
    """``[[routes]]``: which notifiers hear about alerts of matching streams and severities."""

    name: Name
    streams: Glob = "*"
    severities: list[Severity] = Field(default_factory=lambda: list(SEVERITIES), min_length=1)
    notifiers: list[str] = []
    escalate_to: list[str] = []
    notify_on: list[Literal[NOTICE_KINDS]] = Field(  # type: ignore[valid-type]
        default_factory=lambda: list(DEFAULT_NOTICES)
    )

    @model_validator(mode="after")
    def _somewhere(self) -> Route:
        if not self.notifiers and not self.escalate_to:
            raise _fail((("notifiers",), "a route needs notifiers, escalate_to, or both"))
        return self

    def covers(self, stream: str, severity: str) -> bool:
        return severity in self.severities and fnmatchcase(stream, self.streams)


class BudgetSection(_Section):
    """``[budget]``: what the planner aims for."""

    false_alarms_per_week: float | None = Field(None, gt=0)


# --------------------------------------------------------------------------- secrets

_SECRET_KEY = re.compile(r"(?:^|_)(?:password|passwd|secret|token|api_?key)$", re.IGNORECASE)


def _inline_secrets(
    data: Any, loc: tuple[str | int, ...] = ()
) -> list[tuple[tuple[str | int, ...], str]]:
    """Keys such as ``password`` or ``api_token`` holding a value: refused wherever they are."""
    found: list[tuple[tuple[str | int, ...], str]] = []
    if isinstance(data, Mapping):
        for key, value in data.items():
            if isinstance(key, str) and _SECRET_KEY.search(key):
                found.append(
                    (
                        (*loc, key),
                        "secrets are never written into the config file (it gets copied, "
                        f'mailed and committed); use {key}_env = "VARIABLE" to read it from '
                        f'the environment or {key}_file = "/path" for a file only the service '
                        "user can read",
                    )
                )
            else:
                found.extend(_inline_secrets(value, (*loc, key)))
    elif isinstance(data, list):
        for i, value in enumerate(data):
            found.extend(_inline_secrets(value, (*loc, i)))
    return found


def _without(data: Any, loc: tuple[str | int, ...]) -> Any:
    """A copy of ``data`` without the key at ``loc`` (it has been reported already)."""
    head, *rest = loc
    if isinstance(data, Mapping):
        if not rest:
            return {k: v for k, v in data.items() if k != head}
        return {k: (_without(v, tuple(rest)) if k == head else v) for k, v in data.items()}
    if isinstance(data, list) and isinstance(head, int):
        return [_without(v, tuple(rest)) if i == head else v for i, v in enumerate(data)]
    return data


@dataclass(frozen=True, slots=True)
class SecretRef:
    """A place the config says a secret lives; read with :func:`limitwatch.secrets.resolve_secret`
    at start-up (``check`` reads it too, to prove it is there)."""

    path: str
    env: str | None
    file: Path | None
    what: str


# --------------------------------------------------------------------------- the whole file


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
        """Each entry by the settings model of the source plugin its ``type`` names: a
        discriminated union of the types the file uses, so only their plugins are imported."""
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
                    chosen.append(adapter.validate_python(dict(raw), context=info.context))
                except ValidationError as exc:
                    problems.extend(((i, *loc), msg) for loc, msg in _as_problems(exc, union))
        if problems:
            raise _fail(*problems)
        return chosen

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
            resolved = []
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
        for i, entry in enumerate(self.notifiers):
            bases = dict.fromkeys(
                key.rsplit("_", 1)[0]
                for key in entry
                if key.endswith(("_env", "_file")) and _SECRET_KEY.search(key.rsplit("_", 1)[0])
            )
            for base in bases:
                env, file = entry.get(f"{base}_env"), entry.get(f"{base}_file")
                if env is None and file is None:
                    continue
                refs.append(
                    SecretRef(
                        f"notifiers[{i}].{base}_env"
                        if env is not None
                        else f"notifiers[{i}].{base}_file",
                        env,
                        None if file is None else Path(file),
                        f"{base.replace('_', ' ')} for notifier {entry.get('name')!r}",
                    )
                )
        return refs

    def warnings(self) -> list[Problem]:
        """Things that are allowed but probably not meant; ``check`` prints them."""
        out: list[Problem] = []
        if not self.sources:
            out.append(Problem("sources", "no sources: the service would read nothing"))
        for i, source in enumerate(self.sources):
            out.extend(source.advice(f"sources[{i}]"))
        seen: dict[str, int] = {}
        for i, entry in enumerate(self.streams):
            if entry.match in seen:
                out.append(
                    Problem(
                        f"streams[{i}].match",
                        f"same glob as streams[{seen[entry.match]}], which always wins",
                    )
                )
            elif "*" in seen:
                out.append(
                    Problem(f"streams[{i}].match", f"streams[{seen['*']}] matches '*' first")
                )
            seen.setdefault(entry.match, i)
        if self.alerts.escalate_after is not None and not any(r.escalate_to for r in self.routes):
            out.append(
                Problem(
                    "alerts.escalate_after",
                    "no route has escalate_to, so escalations reach nobody",
                )
            )
        if (
            self.alerts.repeat_every is not None
            and self.notifiers
            and not any("reminder" in r.notify_on and r.notifiers for r in self.routes)
        ):
            out.append(
                Problem(
                    "alerts.repeat_every",
                    'reminders are due but no route hears them; add "reminder" to a route\'s '
                    'notify_on, or set repeat_every = "off"',
                )
            )
        if self.routes:
            used = {n for r in self.routes for n in (*r.notifiers, *r.escalate_to)}
            for i, notifier in enumerate(self.notifiers):
                if notifier.get("name") not in used:
                    out.append(
                        Problem(f"notifiers[{i}]", f"{notifier.get('name')!r} is in no route")
                    )
        elif self.notifiers:
            out.append(
                Problem(
                    "routes", "no routes: every notifier gets the default notices but escalations"
                )
            )
        return out


def _needs_type(what: str) -> str:
    return f'a {what} needs type = "..." naming what kind it is'


def _reference_problems(data: Mapping[str, Any]) -> list[tuple[tuple[str | int, ...], str]]:
    """Unique names and route references, checked on the raw tables so they are reported even
    when other keys of the same file are wrong."""
    out: list[tuple[tuple[str | int, ...], str]] = []

    def tables(key: str) -> list[tuple[int, Mapping[str, Any]]]:
        value = data.get(key)
        if not isinstance(value, list):
            return []
        return [(i, t) for i, t in enumerate(value) if isinstance(t, Mapping)]

    def unique(section: str, key: str, what: str) -> set[str]:
        first: dict[str, int] = {}
        for i, table in tables(section):
            value = table.get(key)
            if not isinstance(value, str):
                continue
            if value in first:
                out.append(
                    (
                        (section, i, key),
                        f"{what} {value!r} is already used by {section}[{first[value]}]",
                    )
                )
            else:
                first[value] = i
        return set(first)

    unique("sources", "name", "source name")
    unique("sources", "client_id", "client id")
    notifiers = unique("notifiers", "name", "notifier name")
    routes = unique("routes", "name", "route name")
    for i, route in tables("routes"):
        name = route.get("name")
        if isinstance(name, str) and name in notifiers and name in routes:
            out.append(
                (
                    ("routes", i, "name"),
                    f"{name!r} is also a notifier's name; the outbox tells them apart by name, "
                    "so rename one",
                )
            )
    listing = ", ".join(sorted(notifiers)) or "(none)"
    for i, route in tables("routes"):
        for key in ("notifiers", "escalate_to"):
            names = route.get(key)
            if not isinstance(names, list):
                continue
            for j, name in enumerate(names):
                if isinstance(name, str) and name not in notifiers:
                    out.append(
                        (
                            (("routes", i, key, j)),
                            f"no notifier named {name!r}; notifiers: {listing}",
                        )
                    )
    return out


# --------------------------------------------------------------------------- error translation


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


def _problems(exc: ValidationError) -> list[Problem]:
    """Every problem once, in the order of the file's sections (then of their entries)."""
    order = {name: i for i, name in enumerate(Config.model_fields)}

    def place(item: tuple[tuple[str | int, ...], str]) -> tuple[int, int]:
        loc = item[0]
        section = order.get(loc[0], len(order)) if loc else -1
        entry = loc[1] if len(loc) > 1 and isinstance(loc[1], int) else -1
        return section, entry

    problems: list[Problem] = []
    for loc, message in sorted(_as_problems(exc, Config), key=place):
        problem = Problem(key_path(loc), message)
        if problem not in problems:
            problems.append(problem)
    return problems


# --------------------------------------------------------------------------- loading


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


def check_secrets(config: Config) -> list[Problem]:
    """Read every secret the config points at, the way start-up will; one problem per secret
    that is missing, empty, or in a file other users can read."""
    from limitwatch.secrets import SecretError, resolve_secret

    problems: list[Problem] = []
    for ref in config.secret_refs():
        try:
            resolve_secret(env=ref.env, file=ref.file, what=ref.what)
        except SecretError as exc:
            problems.append(Problem(ref.path, str(exc)))
    return problems


def check_files(config: Config) -> list[Problem]:
    """The other files the config names must be there: TLS certificates and CA files, and the
    folder the database goes in. (File-source globs may match nothing yet; that is allowed.)"""
    wanted: list[tuple[str, Path]] = []
    for i, source in enumerate(config.sources):
        wanted.extend(source.files_needed(f"sources[{i}]"))
    for i, entry in enumerate(config.notifiers):
        for key, value in entry.items():
            if key.endswith("_file") and not _SECRET_KEY.search(key[:-5]) and value is not None:
                wanted.append((f"notifiers[{i}].{key}", Path(value)))
    problems = [
        Problem(path, f"{file} does not exist" if not file.exists() else f"{file} is not a file")
        for path, file in wanted
        if not file.is_file()
    ]
    folder = config.store.path.parent
    if not folder.is_dir():
        problems.append(Problem("store.path", f"the folder {folder} does not exist"))
    return problems


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
