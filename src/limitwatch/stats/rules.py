"""The registry of detectors and the selection of rules: which rule ids exist
(:data:`DETECTORS`, :data:`RULE_IDS` -- the one list), the presets, and reading a selection.

Selecting rules: :func:`parse_rules` reads a preset name (``limits``, ``western-electric``,
``nelson``) or a comma list of rule ids, each optionally followed by parameters in parentheses,
and presets may be mixed in::

    western-electric, ewma(lam=0.1, L=2.814)
    beyond-limits, run-one-side(length=9), trend, cusum(h=4)

:func:`build_detectors` turns the parsed list into fresh detector objects for one stream.

The detectors themselves are in :mod:`limitwatch.stats.runtests` (run tests) and
:mod:`limitwatch.stats.smoothing` (EWMA, CUSUM); they are re-exported here.
"""

from __future__ import annotations

import inspect
import math
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any

from limitwatch.stats.runtests import (
    Alternating,
    AvoidingCenter,
    BeyondLimits,
    FourOfFiveZoneB,
    HuggingCenter,
    MrBeyondLimit,
    RunOneSide,
    Trend,
    TwoOfThreeZoneA,
    _Rule,
)
from limitwatch.stats.signal import Detector
from limitwatch.stats.smoothing import SMOOTHERS, Cusum, Ewma

__all__ = [
    "DETECTORS",
    "PRESETS",
    "RULES",
    "RULE_IDS",
    "STALE",
    "Alternating",
    "AvoidingCenter",
    "BeyondLimits",
    "Cusum",
    "Ewma",
    "FourOfFiveZoneB",
    "HuggingCenter",
    "MrBeyondLimit",
    "RuleSpec",
    "RuleSpecError",
    "RunOneSide",
    "Trend",
    "TwoOfThreeZoneA",
    "UnknownRuleError",
    "build_detectors",
    "detector_from_state",
    "parse_rules",
]


RULES: Mapping[str, type[_Rule]] = MappingProxyType(
    {
        cls.rule: cls
        for cls in (
            BeyondLimits,
            TwoOfThreeZoneA,
            FourOfFiveZoneB,
            RunOneSide,
            Trend,
            Alternating,
            HuggingCenter,
            AvoidingCenter,
            MrBeyondLimit,
        )
    }
)
"""The run tests by id."""

DETECTORS: Mapping[str, type[_Rule] | type[Ewma] | type[Cusum]] = MappingProxyType(
    {**RULES, **SMOOTHERS}
)
"""Every detector that :func:`parse_rules` knows: the run tests plus ``ewma`` and ``cusum``."""

STALE = "stale"
"""The rule id of the check that a stream still reports (the service runs it, not a detector)."""

RULE_IDS: tuple[str, ...] = (*sorted(DETECTORS), STALE)
"""Every rule id a signal can carry. This registry is the one list; others derive from it."""


class RuleSpecError(ValueError):
    """A rule selection that cannot be used; the message says what to write instead."""


class UnknownRuleError(RuleSpecError):
    """A name that is neither a known rule id nor a preset."""


@dataclass(frozen=True, slots=True)
class RuleSpec:
    """One detector to build for every stream: a rule id and the parameters that differ from
    the defaults (sorted by name, so equal selections compare equal)."""

    rule: str
    params: tuple[tuple[str, float | int | bool], ...] = ()

    def build(self) -> Detector:
        """A fresh detector; every stream gets its own."""
        make: Callable[..., Detector] = DETECTORS[self.rule]  # parameters checked when parsed
        return make(**dict(self.params))

    def __str__(self) -> str:
        if not self.params:
            return self.rule
        return f"{self.rule}({', '.join(f'{k}={_format(v)}' for k, v in self.params)})"


def _format(value: float | int | bool) -> str:
    return str(value).lower() if isinstance(value, bool) else repr(value)


def _spec(rule: str, **params: Any) -> RuleSpec:
    """Check parameters by building once; keep only those that differ from the defaults."""
    cls = DETECTORS[rule]
    try:
        cls(**params)
    except (TypeError, ValueError) as exc:
        raise RuleSpecError(f"{rule}: {exc}") from None
    defaults = _defaults(rule)
    return RuleSpec(rule, tuple(sorted((k, v) for k, v in params.items() if v != defaults[k])))


def _defaults(rule: str) -> dict[str, Any]:
    return {name: p.default for name, p in inspect.signature(DETECTORS[rule]).parameters.items()}


PRESETS: Mapping[str, tuple[RuleSpec, ...]] = MappingProxyType(
    {
        "limits": (RuleSpec("beyond-limits"), RuleSpec("mr-beyond-limit")),
        "western-electric": (
            RuleSpec("beyond-limits"),
            RuleSpec("two-of-three-zone-a"),
            RuleSpec("four-of-five-zone-b"),
            RuleSpec("run-one-side"),
            RuleSpec("mr-beyond-limit"),
        ),
        "nelson": (
            RuleSpec("beyond-limits"),
            RuleSpec("run-one-side", (("length", 9),)),
            RuleSpec("trend"),
            RuleSpec("alternating"),
            RuleSpec("two-of-three-zone-a"),
            RuleSpec("four-of-five-zone-b"),
            RuleSpec("hugging-center"),
            RuleSpec("avoiding-center"),
            RuleSpec("mr-beyond-limit"),
        ),
    }
)
"""Named selections: Shewhart limits only, the Western Electric rules 1-4, Nelson's eight tests;
each with the moving-range limit."""

_ITEM = re.compile(r"\s*([A-Za-z0-9_-]+)\s*(?:\(([^()]*)\))?\s*(,|$)")
_PARAM = re.compile(r"\s*([A-Za-z_][A-Za-z0-9_]*)\s*=\s*([^=\s]+)\s*$")


def _value(rule: str, name: str, text: str, default: Any) -> float | int | bool:
    try:
        if isinstance(default, bool):
            if text.lower() not in ("true", "false"):
                raise ValueError
            return text.lower() == "true"
        if isinstance(default, int):
            return int(text)
        value = float(text)
    except ValueError:
        kind = {bool: "true/false", int: "whole number"}.get(type(default), "number")
        raise RuleSpecError(f"{rule}({name}=...) needs a {kind}, got {text!r}") from None
    if not math.isfinite(value):
        raise RuleSpecError(f"{rule}({name}=...) needs a finite number, got {text!r}")
    return value


def _unknown(name: str) -> UnknownRuleError:
    return UnknownRuleError(
        f"unknown rule or preset {name!r}; rules: {', '.join(sorted(DETECTORS))}; "
        f"presets: {', '.join(sorted(PRESETS))}"
    )


def parse_rules(text: str) -> list[RuleSpec]:
    """Read a rule selection: a preset name or a comma list of rule ids and presets.

    A rule id may carry parameters in parentheses, ``name=value`` separated by commas; names
    are the detector's constructor parameters, and ``true``/``false`` are accepted for switches.
    Repeating an identical rule is harmless (the copy is dropped); the same rule twice with
    different parameters is an error, since its signals could not be told apart.

    >>> [str(spec) for spec in parse_rules("limits, run-one-side(length=9), ewma(lam=0.1)")]
    ['beyond-limits', 'mr-beyond-limit', 'run-one-side(length=9)', 'ewma(lam=0.1)']
    """
    specs: dict[str, RuleSpec] = {}
    pos, end = 0, len(text)
    if not text.strip():
        raise RuleSpecError("no rules selected; name a preset or a comma list of rule ids")
    while pos < end:
        match = _ITEM.match(text, pos)
        if match is None or match.end() == pos:
            raise RuleSpecError(
                f"cannot read the rule selection at {text[pos:]!r}; "
                "write e.g. 'trend, run-one-side(length=9)'"
            )
        name, args, sep = match.groups()
        pos = match.end()
        if sep == "," and pos >= end:
            raise RuleSpecError("the rule selection ends with a comma")
        if name in PRESETS and args is None:
            new = list(PRESETS[name])
        elif name in DETECTORS:
            defaults = _defaults(name)
            params: dict[str, Any] = {}
            for part in args.split(",") if args and args.strip() else ():
                pm = _PARAM.match(part)
                if pm is None:
                    raise RuleSpecError(
                        f"{name}: cannot read parameter {part.strip()!r}; write name=value"
                    )
                key, raw = pm.groups()
                if key not in defaults:
                    raise RuleSpecError(
                        f"{name} has no parameter {key!r}; its parameters: {', '.join(defaults)}"
                    )
                if key in params:
                    raise RuleSpecError(f"{name}: parameter {key!r} given twice")
                params[key] = _value(name, key, raw, defaults[key])
            new = [_spec(name, **params)]
        elif name in PRESETS:
            raise RuleSpecError(f"preset {name!r} takes no parameters")
        else:
            raise _unknown(name)
        for spec in new:
            seen = specs.get(spec.rule)
            if seen is not None and seen != spec:
                raise RuleSpecError(
                    f"{spec.rule} selected twice with different parameters: {seen} and {spec}"
                )
            specs[spec.rule] = spec
    return list(specs.values())


def build_detectors(specs: Iterable[RuleSpec]) -> list[Detector]:
    """Fresh detectors for one stream (never shared between streams).

    >>> [type(d).__name__ for d in build_detectors(parse_rules("limits"))]
    ['BeyondLimits', 'MrBeyondLimit']
    """
    return [spec.build() for spec in specs]


def detector_from_state(data: Mapping[str, Any]) -> Detector:
    """Rebuild any detector from its ``state()`` (e.g. a format 1 checkpoint's entry)."""
    cls = DETECTORS.get(data.get("rule", ""))
    if cls is None:
        raise _unknown(str(data.get("rule")))
    return cls.from_state(data)
