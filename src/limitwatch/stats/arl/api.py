"""The public entry point: choose a method for a rule selection, answer, and remember.

Why one place: the choice between an exact chain and a simulation, the cache key that names
the question in full, and the cache itself must agree, or a saved answer could be reused for a
different question. Results are cached per (rules, shift, start, resolution, simulation
settings) for the life of the process; :func:`cache_export` and :func:`cache_import` let a
caller keep them in a file (this package does no I/O itself).
"""

from __future__ import annotations

import functools
import math
import zlib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any, Literal

from limitwatch.stats.arl.common import ArlError, RunLength, _label, _richardson, _TooLarge
from limitwatch.stats.arl.moving_range import _NODES, _mr_chain
from limitwatch.stats.arl.simulation import simulate_run_lengths
from limitwatch.stats.arl.smoothed import _CUSUM_CELLS, _EWMA_CELLS, _cusum_chain, _ewma_chain
from limitwatch.stats.arl.zone import ZONE_RULES, _zone_chain
from limitwatch.stats.rules import RuleSpec, parse_rules

ALGORITHM_VERSION = 1
"""Part of every cache key: raise it when a change to the methods changes any result."""

Start = Literal["zero", "steady"]
Method = Literal["auto", "exact", "simulate"]


# -- choosing a method -----------------------------------------------------------------------------


def simulation_reason(specs: Iterable[RuleSpec]) -> str | None:
    """Why a selection has no exact chain (None when it has one)."""
    rules = {s.rule for s in specs}
    if not rules:
        return "no rules selected"
    if rules & {"trend", "alternating"}:
        return "trend and alternating depend on the order of successive values"
    unknown = rules - ZONE_RULES - {"mr-beyond-limit", "ewma", "cusum"}
    if unknown:
        return f"no Markov chain is built here for {', '.join(sorted(unknown))}"
    smoothers = rules & {"ewma", "cusum"}
    if len(smoothers) > 1:
        return "EWMA and CUSUM together have a two-dimensional continuous state"
    if smoothers:
        if rules - smoothers - {"beyond-limits"}:
            return "an EWMA or CUSUM mixed with run tests has a state too large to enumerate"
        return None
    if "mr-beyond-limit" in rules and "beyond-limits" not in rules:
        return "the moving-range rule without beyond-limits has an unbounded state"
    return None


def exact_kind(specs: Iterable[RuleSpec]) -> str | None:
    """``zone``, ``zone+mr``, ``ewma`` or ``cusum`` when an exact chain exists, else None."""
    specs = list(specs)
    if simulation_reason(specs) is not None:
        return None
    rules = {s.rule for s in specs}
    if "ewma" in rules:
        return "ewma"
    if "cusum" in rules:
        return "cusum"
    return "zone+mr" if "mr-beyond-limit" in rules else "zone"


def _exact(specs: tuple[RuleSpec, ...], shift: float, steady: bool, resolution: int) -> RunLength:
    kind = exact_kind(specs)
    by_rule = {s.rule: s.build() for s in specs}
    limits: Any = by_rule.get("beyond-limits")
    k = None if limits is None else float(limits.k)
    if kind == "zone":
        arl, sd, n = _zone_chain(specs, shift, steady)
    elif kind == "zone+mr":
        zone = tuple(s for s in specs if s.rule != "mr-beyond-limit")
        c = float(by_rule["mr-beyond-limit"].limit)  # type: ignore[attr-defined]
        assert k is not None
        arl, sd, n = _mr_chain(zone, k, c, shift, steady, _NODES * resolution)
    elif kind == "ewma":
        det: Any = by_rule["ewma"]
        runs = [
            _ewma_chain(det.lam, det.L, det.exact_startup, k, shift, steady, m * resolution)
            for m in (_EWMA_CELLS, 2 * _EWMA_CELLS)
        ]
        h1, h2 = 1.0 / runs[0][2], 1.0 / runs[1][2]
        arl = _richardson(runs[0][0], runs[1][0], h1, h2)
        sd = _richardson(runs[0][1], runs[1][1], h1, h2)
        n = runs[1][2]
    elif kind == "cusum":
        det = by_rule["cusum"]
        runs = [
            _cusum_chain(det.k, det.h, det.headstart, k, shift, steady, m * resolution)
            for m in (_CUSUM_CELLS, 2 * _CUSUM_CELLS)
        ]
        h1 = 1.0 / (2 * _CUSUM_CELLS * resolution - 1)
        h2 = 1.0 / (4 * _CUSUM_CELLS * resolution - 1)
        arl = _richardson(runs[0][0], runs[1][0], h1, h2)
        sd = _richardson(runs[0][1], runs[1][1], h1, h2)
        n = runs[1][2]
    else:
        raise ArlError(f"{_label(specs)}: no exact method ({simulation_reason(specs)})")
    return RunLength(arl=arl, sd=sd, method="exact", states=n)


# -- the public entry point and its cache --------------------------------------------------------


@dataclass(frozen=True)
class _Key:
    specs: tuple[RuleSpec, ...]
    shift: float
    start: Start
    method: Method
    resolution: int
    rel_error: float
    max_runs: int
    seed: int | None

    @property
    def text(self) -> str:
        """The question in full, every detector parameter spelt out (defaults included), so a
        saved answer is never reused after a default changes."""
        rules = ", ".join(_spelt_out(s) for s in self.specs)
        return (
            f"v{ALGORITHM_VERSION}|{rules}|shift={self.shift!r}|{self.start}|"
            f"{self.method}|res={self.resolution}|sim={self.rel_error!r},{self.max_runs},"
            f"{self.seed}"
        )


def _spelt_out(spec: RuleSpec) -> str:
    params = spec.build().state()["params"]
    return f"{spec.rule}({', '.join(f'{k}={params[k]!r}' for k in sorted(params))})"


_IMPORTED: dict[str, RunLength] = {}
_COMPUTED: dict[str, RunLength] = {}


@functools.lru_cache(maxsize=4096)
def _cached(key: _Key) -> RunLength:
    text = key.text
    known = _IMPORTED.get(text)
    if known is not None:
        return known
    method = key.method
    reason = simulation_reason(key.specs)
    if method == "exact" and reason is not None:
        raise ArlError(f"{_label(key.specs)} has no exact chain: {reason}; simulate instead")
    result = None
    if method != "simulate" and reason is None:
        try:
            result = _exact(key.specs, key.shift, key.start == "steady", key.resolution)
        except _TooLarge as exc:
            if method == "exact":
                raise ArlError(f"{_label(key.specs)}: {exc}; simulate instead") from None
            reason = str(exc)
    if result is None:
        if key.start != "zero":
            raise ArlError(
                f"{_label(key.specs)}: a steady-state start is computed by the exact chains "
                "only; this selection is simulated from the zero state"
            )
        seed = key.seed if key.seed is not None else zlib.crc32(text.encode())
        lengths = simulate_run_lengths(
            key.specs, key.shift, seed=seed, rel_error=key.rel_error, max_runs=key.max_runs
        )
        sd = float(lengths.std(ddof=1))
        result = RunLength(
            arl=float(lengths.mean()),
            sd=sd,
            method="simulated",
            standard_error=sd / math.sqrt(lengths.size),
            runs=int(lengths.size),
        )
    _COMPUTED[text] = result
    return result


def _specs(rules: str | Iterable[RuleSpec]) -> tuple[RuleSpec, ...]:
    specs = parse_rules(rules) if isinstance(rules, str) else list(rules)
    if not specs:
        raise ArlError("no rules selected")
    # The run length does not depend on the order of the rules; one order makes one cache key.
    return tuple(sorted(dict.fromkeys(specs), key=str))


def run_length(
    rules: str | Iterable[RuleSpec],
    shift: float = 0.0,
    *,
    start: Start = "zero",
    method: Method = "auto",
    resolution: int = 1,
    rel_error: float = 0.01,
    max_runs: int = 40_000,
    seed: int | None = None,
) -> RunLength:
    """Mean and standard deviation of the run length of ``rules`` when the mean has shifted by
    ``shift`` sigma (0: in control).

    ``method="auto"`` solves a Markov chain when the selection has one and simulates otherwise;
    ``"exact"`` refuses to simulate and ``"simulate"`` refuses the chain (for cross-checks).
    ``resolution`` multiplies the nodes or cells of the exact methods (accuracy checks);
    ``rel_error``, ``max_runs`` and ``seed`` steer a simulation (the default seed is derived
    from the question, so the same question always gets the same answer).

    >>> r = run_length("cusum(h=4)", 1.0)
    >>> r.method, round(r.arl, 2)
    ('exact', 8.38)
    """
    if start not in ("zero", "steady"):
        raise ArlError(f"start must be 'zero' or 'steady', got {start!r}")
    if method not in ("auto", "exact", "simulate"):
        raise ArlError(f"method must be 'auto', 'exact' or 'simulate', got {method!r}")
    shift = float(shift)
    if not math.isfinite(shift):
        raise ArlError(f"the shift must be a finite number of sigma, got {shift!r}")
    if not (isinstance(resolution, int) and resolution >= 1):
        raise ArlError(f"resolution must be a whole number >= 1, got {resolution!r}")
    if not 0.0 < rel_error < 1.0:
        raise ArlError(f"rel_error must be between 0 and 1, got {rel_error!r}")
    key = _Key(_specs(rules), shift, start, method, resolution, float(rel_error), max_runs, seed)
    return _cached(key)


def cache_export() -> dict[str, dict[str, Any]]:
    """Every result known to this process (imported or computed), as JSON-ready data keyed by
    a text that names the question and :data:`ALGORITHM_VERSION`."""
    return {text: r.to_dict() for text, r in {**_IMPORTED, **_COMPUTED}.items()}


def cache_import(data: Mapping[str, Any]) -> int:
    """Take results saved by :func:`cache_export`; entries from another algorithm version or
    that do not read back are skipped. Returns how many were taken."""
    taken = 0
    prefix = f"v{ALGORITHM_VERSION}|"
    for text, entry in data.items():
        if not (isinstance(text, str) and text.startswith(prefix) and isinstance(entry, Mapping)):
            continue
        try:
            _IMPORTED[text] = RunLength.from_dict(entry)
        except (KeyError, TypeError, ValueError):
            continue
        taken += 1
    return taken


def cache_clear() -> None:
    """Forget every result (computed and imported)."""
    _cached.cache_clear()
    _IMPORTED.clear()
    _COMPUTED.clear()
