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

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from limitwatch.stats.constants import (
    D2,
    D4,
    E2,
    MEDIAN_MR_D,
    MEDIAN_MR_UCL_FACTOR,
    MEDIAN_X_FACTOR,
)
from limitwatch.stats.limits import (
    ZONES,
    Baseline,
    BaselineError,
    Exclusion,
    ExclusionKind,
    Method,
    Zone,
    _assemble,
    _check_bounds,
    _check_method,
    check_usable,
    limits_of,
    sigma_problem,
)

__all__ = [
    "ZONES",
    "Baseline",
    "BaselineError",
    "Exclusion",
    "ExclusionKind",
    "Method",
    "Zone",
    "check_usable",
    "fit_baseline",
    "limits_of",
    "sigma_problem",
]





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
