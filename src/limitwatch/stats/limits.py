"""A fitted baseline as numbers: center, sigma, limits, zones, exclusions, capability, and
the checks any baseline must pass wherever it comes from (a fit, the store, the config).
Fitting it from readings is :func:`limitwatch.stats.baseline.fit_baseline`."""

from __future__ import annotations

import dataclasses
import math
import operator
import sys
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, Literal, get_args

from limitwatch.stats.capability import Capability, compute_capability
from limitwatch.stats.constants import (
    D2,
    MEDIAN_MR_D,
    MR_UCL_SIGMA,
)

Method = Literal["mean", "median"]
ExclusionKind = Literal["x-beyond-limits", "mr-beyond-limit"]
Zone = Literal[
    "above-ucl",
    "zone-a-upper",
    "zone-b-upper",
    "zone-c-upper",
    "center",
    "zone-c-lower",
    "zone-b-lower",
    "zone-a-lower",
    "below-lcl",
]
ZONES: tuple[str, ...] = get_args(Zone)
"""Zone names from top to bottom; see :meth:`Baseline.zone`."""


class BaselineError(ValueError):
    """The readings cannot give a trustworthy baseline; the message says why and what to do."""


SMALLEST_SIGMA = sys.float_info.min
"""The smallest normal double (about 2.2e-308). Below it a sigma is subnormal: it has lost
precision, and a reading an ordinary distance from the center line divided by it overflows to
infinity, which no detector can judge."""


def sigma_problem(sigma: float) -> str | None:
    """Why ``sigma`` cannot be a baseline's sigma, or None when it can.

    >>> sigma_problem(0.5) is None
    True
    >>> sigma_problem(5e-324)[:46], sigma_problem(0.0)[-7:]
    ('sigma must be a normal positive number (at lea', 'got 0.0')
    """
    if math.isfinite(sigma) and sigma >= SMALLEST_SIGMA:
        return None
    return (
        f"sigma must be a normal positive number (at least {SMALLEST_SIGMA!r} and finite), "
        f"got {sigma!r}"
    )


def check_usable(baseline: Baseline) -> None:
    """Raise :class:`BaselineError` unless the engine can judge readings against ``baseline``:
    a normal positive sigma and a finite center line and limits. Fitted, typed-in and stored
    baselines all pass here, so a bad one is refused where it is made or read, never while a
    reading is being judged."""
    problem = sigma_problem(baseline.sigma)
    if problem is None:
        isfinite = math.isfinite  # a restart checks every stream's stored baseline here
        if not (
            isfinite(baseline.center)
            and isfinite(baseline.lcl_raw)
            and isfinite(baseline.ucl_raw)
            and isfinite(baseline.mr_ucl)
        ):
            problem = (
                f"center {baseline.center!r}, limits {baseline.lcl_raw!r} .. "
                f"{baseline.ucl_raw!r} and MR limit {baseline.mr_ucl!r} must all be finite: "
                "readings this large cannot be charted in double precision; rescale them"
            )
    if problem is not None:
        raise BaselineError(problem)


@dataclass(frozen=True, slots=True)
class Exclusion:
    """One reading or moving range left out of the fit.

    ``position`` is the 0-based position of the reading in the input; for a moving range it is
    the later of its two readings (the range between ``position - 1`` and ``position``).
    ``iteration`` is the exclusion round (1 = judged against limits fitted on all readings),
    ``value`` the reading or moving range and ``limit`` the limit it crossed.
    """

    position: int
    kind: ExclusionKind
    iteration: int
    value: float
    limit: float

    def to_dict(self) -> dict[str, Any]:
        return {
            "position": self.position,
            "kind": self.kind,
            "iteration": self.iteration,
            "value": self.value,
            "limit": self.limit,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Exclusion:
        return cls(
            position=int(data["position"]),
            kind=data["kind"],
            iteration=int(data["iteration"]),
            value=float(data["value"]),
            limit=float(data["limit"]),
        )


@dataclass(frozen=True, slots=True)
class Baseline:
    """A fitted (or typed-in) baseline. Build one with :func:`fit_baseline`,
    :meth:`from_limits` or :meth:`from_dict`.

    ``ucl`` / ``lcl`` are ``None`` when the limit lies beyond a natural bound of the reading
    (``ucl_clipped`` / ``lcl_clipped``); the computed value stays in ``ucl_raw`` / ``lcl_raw``.
    ``mr_bar`` and ``mr_median`` are both reported whatever the ``method``; ``sigma`` and the
    limits come from the one that ``method`` names. ``n`` counts the input readings, ``n_used``
    those the fit kept; ``excluded`` lists the left-out reading positions and ``exclusions``
    every exclusion (readings and moving ranges) with its reason.
    """

    center: float
    mr_bar: float
    mr_median: float
    method: Method
    sigma: float
    ucl: float | None
    lcl: float | None
    lcl_raw: float
    ucl_raw: float
    lcl_clipped: bool
    ucl_clipped: bool
    mr_ucl: float
    n: int
    n_used: int
    excluded: tuple[int, ...]
    exclusions: tuple[Exclusion, ...]
    iterations: int
    converged: bool
    lower_bound: float | None
    upper_bound: float | None
    lag1_autocorrelation: float | None
    sigma_overall: float | None
    capability: Capability | None
    warnings: tuple[str, ...]

    def z(self, x: float) -> float:
        """The reading in sigma units from the center line (what detectors consume)."""
        return (x - self.center) / self.sigma

    def zone(self, x: float) -> Zone:
        """Where a reading falls, for zone run tests and for display.

        Zones are one sigma wide on each side of the center line: C from the center out to one
        sigma, B to two, A to three; a reading exactly on a boundary belongs to the inner zone.
        ``above-ucl`` / ``below-lcl`` mean strictly beyond ``ucl_raw`` / ``lcl_raw``, so they
        agree with the limits the fit used even where a natural bound switched a limit off.
        ``center`` is only a reading exactly on the center line.

        >>> b = Baseline.from_limits(center=10.0, sigma=1.0)
        >>> [b.zone(v) for v in (13.5, 12.0, 10.0, 9.5, 7.2)]
        ['above-ucl', 'zone-b-upper', 'center', 'zone-c-lower', 'zone-a-lower']
        """
        if math.isnan(x):
            raise ValueError("a NaN reading has no zone")
        if x > self.ucl_raw:
            return "above-ucl"
        if x < self.lcl_raw:
            return "below-lcl"
        d = x - self.center
        s = self.sigma
        if d > 0:
            return "zone-a-upper" if d > 2 * s else "zone-b-upper" if d > s else "zone-c-upper"
        if d < 0:
            return "zone-a-lower" if -d > 2 * s else "zone-b-lower" if -d > s else "zone-c-lower"
        return "center"

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly data. The headline numbers (center, mr_bar, sigma, ucl, lcl, mr_ucl, n,
        excluded, cp, cpk, pp, ppk) sit at the top level for people and dashboards; the rest
        follows so that :meth:`from_dict` rebuilds an equal baseline."""
        cap = self.capability
        return {
            "center": self.center,
            "mr_bar": self.mr_bar,
            "sigma": self.sigma,
            "ucl": self.ucl,
            "lcl": self.lcl,
            "mr_ucl": self.mr_ucl,
            "n": self.n,
            "excluded": list(self.excluded),
            "cp": cap.cp if cap else None,
            "cpk": cap.cpk if cap else None,
            "pp": cap.pp if cap else None,
            "ppk": cap.ppk if cap else None,
            "mr_median": self.mr_median,
            "method": self.method,
            "lcl_raw": self.lcl_raw,
            "ucl_raw": self.ucl_raw,
            "lcl_clipped": self.lcl_clipped,
            "ucl_clipped": self.ucl_clipped,
            "n_used": self.n_used,
            "exclusions": [e.to_dict() for e in self.exclusions],
            "iterations": self.iterations,
            "converged": self.converged,
            "lower_bound": self.lower_bound,
            "upper_bound": self.upper_bound,
            "lag1_autocorrelation": self.lag1_autocorrelation,
            "sigma_overall": self.sigma_overall,
            "capability": cap.to_dict() if cap else None,
            "warnings": list(self.warnings),
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Baseline:
        """Rebuild a baseline from :meth:`to_dict` output (e.g. a stored JSON document).

        The top-level cp/cpk/pp/ppk are a copy for readers; the ``capability`` entry is the
        source of truth.
        """
        _check_method(data.get("method"))
        try:
            cap = data["capability"]
            baseline = cls(
                center=float(data["center"]),
                mr_bar=float(data["mr_bar"]),
                mr_median=float(data["mr_median"]),
                method=data["method"],
                sigma=float(data["sigma"]),
                ucl=_opt_float(data["ucl"]),
                lcl=_opt_float(data["lcl"]),
                lcl_raw=float(data["lcl_raw"]),
                ucl_raw=float(data["ucl_raw"]),
                lcl_clipped=bool(data["lcl_clipped"]),
                ucl_clipped=bool(data["ucl_clipped"]),
                mr_ucl=float(data["mr_ucl"]),
                n=int(data["n"]),
                n_used=int(data["n_used"]),
                excluded=tuple(int(p) for p in data["excluded"]),
                exclusions=tuple(Exclusion.from_dict(e) for e in data["exclusions"]),
                iterations=int(data["iterations"]),
                converged=bool(data["converged"]),
                lower_bound=_opt_float(data["lower_bound"]),
                upper_bound=_opt_float(data["upper_bound"]),
                lag1_autocorrelation=_opt_float(data["lag1_autocorrelation"]),
                sigma_overall=_opt_float(data["sigma_overall"]),
                capability=Capability.from_dict(cap) if cap is not None else None,
                warnings=tuple(str(w) for w in data["warnings"]),
            )
        except KeyError as exc:
            raise BaselineError(f"stored baseline is missing the key {exc.args[0]!r}") from exc
        check_usable(baseline)
        return baseline

    @classmethod
    def from_stored(cls, data: dict[str, Any]) -> Baseline:
        """Rebuild a baseline that this program wrote (:meth:`to_dict` kept in a checkpoint and
        read back), trusting its numbers instead of converting each again.

        A restart rebuilds one baseline per stream, and checking twenty numbers of a document
        the store itself wrote took about as long as the rest of the stream's restore. The
        document's keys and method are still checked; one that does not have exactly the keys
        :meth:`to_dict` writes goes through :meth:`from_dict` and its checks (and its error
        naming a missing key).

        >>> b = Baseline.from_limits(center=5.0, sigma=2.0, lower_bound=0.0)
        >>> Baseline.from_stored(b.to_dict()) == b
        True
        """
        if len(data) != len(_STORED_KEYS) or data.get("method") not in _METHODS:
            return cls.from_dict(data)
        try:  # with as many keys as to_dict writes, a missing one means an unknown one
            values = _stored_values(data)
        except KeyError:
            return cls.from_dict(data)
        # Each field's slot is filled directly: a frozen dataclass's __init__ goes through
        # object.__setattr__ for each of its 24 fields, a third of this method's time. The
        # fields JSON cannot hold as they are (tuples, nested classes) are then set again.
        baseline = object.__new__(cls)
        for put, value in zip(_FIELD_SETTERS, values):  # noqa: B905 -- one value per field
            put(baseline, value)
        _FIELD_SETTERS[_EXCLUDED](baseline, tuple(values[_EXCLUDED]))
        exclusions = values[_EXCLUSIONS]
        _FIELD_SETTERS[_EXCLUSIONS](
            baseline, tuple([Exclusion.from_dict(e) for e in exclusions]) if exclusions else ()
        )
        cap = values[_CAPABILITY]
        if cap is not None:
            _FIELD_SETTERS[_CAPABILITY](baseline, Capability.from_dict(cap))
        _FIELD_SETTERS[_WARNINGS](baseline, tuple(values[_WARNINGS]))
        return baseline

    @classmethod
    def from_limits(
        cls,
        *,
        center: float,
        sigma: float,
        method: Method = "mean",
        lower_bound: float | None = None,
        upper_bound: float | None = None,
        spec_lower: float | None = None,
        spec_upper: float | None = None,
        sigma_overall: float | None = None,
    ) -> Baseline:
        """A baseline from a known center line and sigma (typed in, or agreed from an earlier
        study) rather than from readings. The moving-range statistics are the values that
        sigma implies (``MRbar = d2 sigma``, ``median MR = 0.954 sigma``); ``n`` is 0.

        >>> b = Baseline.from_limits(center=5.0, sigma=2.0, lower_bound=0.0)
        >>> b.ucl, b.lcl, b.lcl_raw, b.lcl_clipped
        (11.0, None, -1.0, True)
        """
        center, sigma = float(center), float(sigma)
        if not math.isfinite(center):
            raise BaselineError(f"center must be a finite number, got {center!r}")
        problem = sigma_problem(sigma)
        if problem is not None:
            raise BaselineError(problem)
        _check_method(method)
        lower_bound, upper_bound = _check_bounds(lower_bound, upper_bound)
        half = 3.0 * sigma
        return _assemble(
            center=center,
            mr_bar=D2 * sigma,
            mr_median=MEDIAN_MR_D * sigma,
            method=method,
            sigma=sigma,
            lcl_raw=center - half,
            ucl_raw=center + half,
            mr_ucl=MR_UCL_SIGMA * sigma,
            n=0,
            n_used=0,
            excluded=(),
            exclusions=(),
            iterations=0,
            converged=True,
            lower_bound=lower_bound,
            upper_bound=upper_bound,
            lag1=None,
            sigma_overall=None if sigma_overall is None else float(sigma_overall),
            spec_lower=spec_lower,
            spec_upper=spec_upper,
            warnings=[],
        )


_METHODS: tuple[str, ...] = get_args(Method)


def limits_of(numbers: Mapping[str, Any]) -> Baseline | None:
    """A stored baseline's numbers as a :class:`Baseline`: the full fit when stored whole
    (:meth:`Baseline.to_dict`), else from its center and sigma, else None (numbers no fit could
    have made, from a database written by hand or by a future version)."""
    try:
        return Baseline.from_dict(dict(numbers))
    except (BaselineError, KeyError, TypeError, ValueError):
        pass
    try:
        return Baseline.from_limits(center=numbers["center"], sigma=numbers["sigma"])
    except (BaselineError, KeyError, TypeError, ValueError):
        return None


def _opt_float(v: Any) -> float | None:
    return None if v is None else float(v)


def _check_method(method: object) -> None:
    if method not in get_args(Method):
        raise BaselineError(f"method must be 'mean' or 'median', got {method!r}")


def _check_bounds(
    lower_bound: float | None, upper_bound: float | None
) -> tuple[float | None, float | None]:
    lo = None if lower_bound is None else float(lower_bound)
    hi = None if upper_bound is None else float(upper_bound)
    for name, b in (("lower_bound", lo), ("upper_bound", hi)):
        if b is not None and not math.isfinite(b):
            raise BaselineError(f"{name} must be a finite number or None, got {b!r}")
    if lo is not None and hi is not None and lo >= hi:
        raise BaselineError(f"lower_bound ({lo!r}) must be below upper_bound ({hi!r})")
    return lo, hi


def _assemble(
    *,
    center: float,
    mr_bar: float,
    mr_median: float,
    method: Method,
    sigma: float,
    lcl_raw: float,
    ucl_raw: float,
    mr_ucl: float,
    n: int,
    n_used: int,
    excluded: tuple[int, ...],
    exclusions: tuple[Exclusion, ...],
    iterations: int,
    converged: bool,
    lower_bound: float | None,
    upper_bound: float | None,
    lag1: float | None,
    sigma_overall: float | None,
    spec_lower: float | None,
    spec_upper: float | None,
    warnings: list[str],
) -> Baseline:
    """Apply natural bounds and capability, the parts shared by fitted and typed-in baselines."""
    lcl_clipped = lower_bound is not None and lcl_raw < lower_bound
    ucl_clipped = upper_bound is not None and ucl_raw > upper_bound
    capability = None
    if spec_lower is not None or spec_upper is not None:
        try:
            capability = compute_capability(center, sigma, sigma_overall, spec_lower, spec_upper)
        except ValueError as exc:
            raise BaselineError(str(exc)) from exc
    baseline = Baseline(
        center=center,
        mr_bar=mr_bar,
        mr_median=mr_median,
        method=method,
        sigma=sigma,
        ucl=None if ucl_clipped else ucl_raw,
        lcl=None if lcl_clipped else lcl_raw,
        lcl_raw=lcl_raw,
        ucl_raw=ucl_raw,
        lcl_clipped=lcl_clipped,
        ucl_clipped=ucl_clipped,
        mr_ucl=mr_ucl,
        n=n,
        n_used=n_used,
        excluded=excluded,
        exclusions=exclusions,
        iterations=iterations,
        converged=converged,
        lower_bound=lower_bound,
        upper_bound=upper_bound,
        lag1_autocorrelation=lag1,
        sigma_overall=sigma_overall,
        capability=capability,
        warnings=tuple(warnings),
    )
    check_usable(baseline)
    return baseline


_STORED_KEYS = frozenset(Baseline.from_limits(center=0.0, sigma=1.0).to_dict())
"""The keys of every document :meth:`Baseline.to_dict` writes."""

_FIELDS: tuple[str, ...] = tuple(f.name for f in dataclasses.fields(Baseline))
_stored_values = operator.itemgetter(*_FIELDS)
"""A stored document's value of every field, in field order (one call, for a restart)."""
_FIELD_SETTERS: tuple[Callable[[Baseline, Any], None], ...] = tuple(
    getattr(Baseline, name).__set__ for name in _FIELDS
)
"""Each field's slot setter, by which :meth:`Baseline.from_stored` fills a new baseline."""
_EXCLUDED, _EXCLUSIONS, _CAPABILITY, _WARNINGS = (
    _FIELDS.index(name) for name in ("excluded", "exclusions", "capability", "warnings")
)
