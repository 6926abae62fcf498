"""Phase I: fit the baseline (center line, sigma, limits) of an individuals / moving-range chart.

Why this is more than ``mean +- E2 * MRbar``: a history used for limits is rarely clean. A wild
reading inflates the moving ranges and widens the limits it should have broken; a sensor that
cannot go below zero gets a lower limit it can never cross; readings that follow each other too
closely (autocorrelation) give moving ranges that understate the real spread. :func:`fit_baseline`
handles each openly: optional iterative exclusion with every excluded reading recorded, natural
bounds that switch a limit off instead of drawing it where no reading can be, and warnings a
person can read. Nothing is dropped or changed silently. For readings that are autocorrelated,
:mod:`limitwatch.stats.autocorrelation` fits an AR(1) model and charts its residuals instead.

Sigma comes from moving ranges of adjacent readings (within variation), either the average
moving range (``sigma = MRbar / d2``) or, more robust to a few large jumps, the median moving
range (``sigma = median MR / 0.954``). Either way ``UCL = center + 3 sigma``.

>>> temps = [61.2, 60.8, 61.5, 61.0, 60.7, 61.3, 61.1, 60.9, 61.4, 61.0,
...          60.6, 61.2, 61.3, 60.8, 61.1, 61.0, 61.6, 60.9, 61.2, 61.0]
>>> b = fit_baseline(temps)
>>> round(b.center, 3), round(b.mr_bar, 3), round(b.ucl, 2), round(b.lcl, 2)
(61.08, 0.4, 62.14, 60.02)
>>> b.zone(61.9)
'zone-a-upper'

References
----------
Wheeler, D. J. and Chambers, D. S., *Understanding Statistical Process Control* (XmR charts,
natural process limits, limits from the median moving range).
Montgomery, D. C., *Introduction to Statistical Quality Control*, chapter on control charts for
individual measurements (phase I use, revising limits by excluding out-of-control points,
effect of autocorrelation).
ASTM E2587, *Standard Practice for Use of Control Charts in Statistical Process Control*.
Box, G. E. P., Jenkins, G. M. and Reinsel, G. C., *Time Series Analysis* (sample autocorrelation).
"""

from __future__ import annotations

import math
import sys
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal, get_args

import numpy as np
from numpy.typing import ArrayLike

from limitwatch.stats.capability import Capability, compute_capability
from limitwatch.stats.constants import (
    D2,
    D4,
    E2,
    MEDIAN_MR_D,
    MEDIAN_MR_UCL_FACTOR,
    MEDIAN_X_FACTOR,
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
        numbers = (baseline.center, baseline.lcl_raw, baseline.ucl_raw, baseline.mr_ucl)
        if not all(math.isfinite(v) for v in numbers):
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
            cap, exclusions = data["capability"], data["exclusions"]
            return cls(
                data["center"],
                data["mr_bar"],
                data["mr_median"],
                data["method"],
                data["sigma"],
                data["ucl"],
                data["lcl"],
                data["lcl_raw"],
                data["ucl_raw"],
                data["lcl_clipped"],
                data["ucl_clipped"],
                data["mr_ucl"],
                data["n"],
                data["n_used"],
                tuple(data["excluded"]),
                tuple([Exclusion.from_dict(e) for e in exclusions]) if exclusions else (),
                data["iterations"],
                data["converged"],
                data["lower_bound"],
                data["upper_bound"],
                data["lag1_autocorrelation"],
                data["sigma_overall"],
                None if cap is None else Capability.from_dict(cap),
                tuple(data["warnings"]),
            )
        except KeyError:
            return cls.from_dict(data)

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


@dataclass(frozen=True, slots=True)
class _Fit:
    center: float
    mr_bar: float
    mr_median: float
    sigma: float
    lcl_raw: float
    ucl_raw: float
    mr_ucl: float


def _fit_once(
    x: np.ndarray, used: np.ndarray, mr: np.ndarray, mr_ok: np.ndarray, method: Method
) -> _Fit:
    """Statistics from the readings in ``used`` and the moving ranges in ``mr_ok``."""
    xu = x[used]
    ref = xu[0]
    # Mean around a reference reading: exact for large offsets with a small spread.
    center = float(ref + np.mean(xu - ref))
    mrs = mr[mr_ok]
    if mrs.size == 0:
        raise BaselineError(
            "no two adjacent readings are left in the fit, so there is no moving range; "
            "fit on a steadier stretch of history or pass exclude_beyond=False"
        )
    mr_bar = float(np.mean(mrs))
    mr_median = float(np.median(mrs))
    if method == "mean":
        stat, sigma_div, x_factor, mr_factor = mr_bar, D2, E2, D4
    else:
        stat, sigma_div, x_factor = mr_median, MEDIAN_MR_D, MEDIAN_X_FACTOR
        mr_factor = MEDIAN_MR_UCL_FACTOR
    if stat == 0.0:
        if mr_bar == 0.0:
            why = "every moving range left in the fit is zero"
        else:
            why = "more than half of the moving ranges are zero, so their median is zero"
        raise BaselineError(
            f"{why}: the readings do not vary (a stuck sensor, or a resolution too coarse for "
            "the process); check the sensor or record more digits"
            + ("; method='mean' may still work" if method == "median" and mr_bar > 0 else "")
        )
    half = x_factor * stat
    return _Fit(
        center=center,
        mr_bar=mr_bar,
        mr_median=mr_median,
        sigma=stat / sigma_div,
        lcl_raw=center - half,
        ucl_raw=center + half,
        mr_ucl=mr_factor * stat,
    )


def _lag1_autocorrelation(xu: np.ndarray) -> float | None:
    """Sample ACF at lag 1: sum (x_t - m)(x_t+1 - m) / sum (x_t - m)^2 over the kept readings
    taken in order (readings on either side of an excluded one count as neighbours)."""
    y = xu - xu[0]  # exact for readings close together, so no offset leaks into the sums
    y -= np.mean(y)
    den = float(np.dot(y, y))
    if den == 0.0 or y.size < 2:
        return None
    return float(np.dot(y[:-1], y[1:]) / den)


def fit_baseline(
    values: ArrayLike,
    *,
    method: Method = "mean",
    lower_bound: float | None = None,
    upper_bound: float | None = None,
    exclude_beyond: bool = False,
    max_iterations: int = 5,
    min_points: int = 10,
    warn_points: int = 20,
    spec_lower: float | None = None,
    spec_upper: float | None = None,
    autocorrelation_threshold: float = 0.5,
) -> Baseline:
    """Fit an XmR baseline from a history of individual readings, in time order.

    The center line is the mean of the kept readings. Moving ranges are taken between readings
    adjacent in the input and both kept; ``method`` chooses the average (``"mean"``) or the
    median (``"median"``) moving range for sigma and the limits.

    ``exclude_beyond`` turns on the usual phase I clean-up, as rounds: readings beyond the X
    limits are left out (the moving ranges that touch them leave with them and are not listed
    separately), moving ranges above the MR upper limit are left out of the moving-range
    statistic (their readings stay in the center line), then everything is refitted.
    Rounds stop when one excludes nothing (``converged``) or after ``max_iterations`` rounds
    (``converged=False``: the final limits still have readings beyond them). Use it with care:
    it fits the limits to the data you kept; a history with a real shift needs splitting, not
    trimming.

    ``lower_bound`` / ``upper_bound`` are the natural bounds of the reading (0 for a count or a
    duration): a reading beyond them is an error, and a limit beyond them is switched off.

    Raises :class:`BaselineError` when the readings cannot give a trustworthy baseline.

    >>> b = fit_baseline([3, 5, 4, 6, 5, 4, 60, 5, 4, 6, 5, 3, 4], exclude_beyond=True,
    ...                  lower_bound=0, warn_points=10)
    >>> b.excluded, len(b.exclusions), b.exclusions[0].kind, b.exclusions[0].iteration
    ((6,), 1, 'x-beyond-limits', 1)
    >>> b.converged, round(b.center, 3), round(b.mr_bar, 3), round(b.lcl, 2)
    (True, 4.5, 1.4, 0.78)

    References
    ----------
    Wheeler, D. J. and Chambers, D. S., *Understanding Statistical Process Control*.
    Montgomery, D. C., *Introduction to Statistical Quality Control* (phase I, revising limits).
    """
    _check_method(method)
    if min_points < 2:
        raise BaselineError(f"min_points must be at least 2, got {min_points}")
    if max_iterations < 0:
        raise BaselineError(f"max_iterations must be 0 or more, got {max_iterations}")
    lower_bound, upper_bound = _check_bounds(lower_bound, upper_bound)
    try:
        x = np.asarray(values, dtype=float)
    except (TypeError, ValueError) as exc:
        raise BaselineError(f"readings must be numbers: {exc}") from exc
    if x.ndim != 1:
        raise BaselineError(f"readings must be a flat sequence, got an array of shape {x.shape}")
    n = int(x.size)
    if n < min_points:
        raise BaselineError(
            f"only {n} readings, fewer than the {min_points} a baseline needs (min_points): "
            f"collect {min_points - n} more or lower min_points (limits from fewer than "
            f"{warn_points} readings are provisional)"
        )
    bad = np.flatnonzero(~np.isfinite(x))
    if bad.size:
        p = int(bad[0])
        raise BaselineError(
            f"reading at position {p} is {float(x[p])!r}, not a finite number "
            f"({bad.size} such reading(s)); drop or repair them before fitting"
        )
    for name, bound, beyond in (
        ("lower_bound", lower_bound, lambda b: x < b),
        ("upper_bound", upper_bound, lambda b: x > b),
    ):
        if bound is not None:
            out = np.flatnonzero(beyond(bound))
            if out.size:
                p = int(out[0])
                raise BaselineError(
                    f"reading at position {p} is {float(x[p])!r}, beyond the natural {name} "
                    f"{bound!r} "
                    f"({out.size} such reading(s)); fix the data or the bound"
                )

    mr = np.empty(n)
    mr[0] = np.nan
    with np.errstate(over="ignore"):
        mr[1:] = np.abs(np.diff(x))
    if not np.all(np.isfinite(mr[1:])):
        p = int(np.flatnonzero(~np.isfinite(mr[1:]))[0]) + 1
        raise BaselineError(
            f"the moving range at position {p} overflows: readings this large cannot be charted "
            "in double precision; rescale them (e.g. change units)"
        )
    if not np.any(mr[1:] > 0):
        raise BaselineError(
            f"all {n - 1} moving ranges are zero: the readings do not vary (a stuck sensor, "
            "or a resolution too coarse for the process); check the sensor or record more digits"
        )

    used = np.ones(n, dtype=bool)
    mr_cut = np.zeros(n, dtype=bool)
    mr_cut[0] = True

    def usable_mr(kept: np.ndarray) -> np.ndarray:
        ok = ~mr_cut
        ok[1:] &= kept[1:] & kept[:-1]
        return ok

    exclusions: list[Exclusion] = []
    rounds = 0
    converged = True
    while True:
        fit = _fit_once(x, used, mr, usable_mr(used), method)
        if not exclude_beyond:
            break
        high = used & (x > fit.ucl_raw)
        low = used & (x < fit.lcl_raw)
        kept = used & ~high & ~low
        mr_high = usable_mr(kept) & (mr > fit.mr_ucl)
        if not (high.any() or low.any() or mr_high.any()):
            break
        if rounds == max_iterations:
            converged = False
            break
        rounds += 1
        found = [
            Exclusion(int(p), "x-beyond-limits", rounds, float(x[p]), fit.ucl_raw)
            for p in np.flatnonzero(high)
        ]
        found += [
            Exclusion(int(p), "x-beyond-limits", rounds, float(x[p]), fit.lcl_raw)
            for p in np.flatnonzero(low)
        ]
        found += [
            Exclusion(int(p), "mr-beyond-limit", rounds, float(mr[p]), fit.mr_ucl)
            for p in np.flatnonzero(mr_high)
        ]
        exclusions += sorted(found, key=lambda e: (e.position, e.kind))
        used = kept
        mr_cut |= mr_high
        n_used = int(used.sum())
        if n_used < min_points:
            raise BaselineError(
                f"excluding readings beyond the limits left {n_used} of {n}, fewer than "
                f"min_points={min_points}: this history is not stable enough for a baseline; "
                "fit on a steadier stretch or pass exclude_beyond=False"
            )

    xu = x[used]
    n_used = int(xu.size)
    lag1 = _lag1_autocorrelation(xu)
    sigma_overall = float(np.std(xu - xu[0], ddof=1))
    warnings: list[str] = []
    if n_used < warn_points:
        warnings.append(
            f"limits from fewer than {warn_points} points are provisional (common practice): "
            f"this baseline uses {n_used}; refit when more readings are in"
        )
    if lag1 is not None and lag1 > autocorrelation_threshold:
        warnings.append(
            f"lag-1 autocorrelation is {lag1:.2f} (above {autocorrelation_threshold}): successive "
            "readings are not independent, so moving-range limits will be too tight and false "
            "alarms more frequent than planned; sample less often, or chart the one-step-ahead "
            "residuals of an AR(1) fit (option --ar1-residuals of 'limitwatch baseline fit' and "
            "'limitwatch replay')"
        )
    if not converged:
        warnings.append(
            f"exclusion stopped after {max_iterations} round(s) with readings still beyond the "
            "limits: the history probably holds a shift or a trend; split it and fit the "
            "stable part"
        )
    return _assemble(
        center=fit.center,
        mr_bar=fit.mr_bar,
        mr_median=fit.mr_median,
        method=method,
        sigma=fit.sigma,
        lcl_raw=fit.lcl_raw,
        ucl_raw=fit.ucl_raw,
        mr_ucl=fit.mr_ucl,
        n=n,
        n_used=n_used,
        excluded=tuple(int(p) for p in np.flatnonzero(~used)),
        exclusions=tuple(exclusions),
        iterations=rounds,
        converged=converged,
        lower_bound=lower_bound,
        upper_bound=upper_bound,
        lag1=lag1,
        sigma_overall=sigma_overall,
        spec_lower=spec_lower,
        spec_upper=spec_upper,
        warnings=warnings,
    )


_STORED_KEYS = frozenset(Baseline.from_limits(center=0.0, sigma=1.0).to_dict())
"""The keys of every document :meth:`Baseline.to_dict` writes."""
