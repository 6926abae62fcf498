"""Charting autocorrelated readings: fit an AR(1) model and chart its one-step-ahead residuals.

Why: XmR limits assume that successive readings are independent. A slowly wandering temperature
or a tank level is not: each reading sits close to the one before, so the moving ranges are
small, sigma from the average moving range is too small, the limits are too tight and the chart
cries wolf (the baseline fit warns when the lag-1 autocorrelation is high). Alwan & Roberts
(1988) proposed fitting a time-series model and charting its residuals -- the part of each
reading that the previous readings did not predict -- which are close to independent when the
model fits. For the commonest case, a first-order autoregressive process,

    x_t - mu = phi (x_(t-1) - mu) + e_t,

the one-step-ahead residual of reading ``t`` is ``e_t = x_t - mu - phi (x_(t-1) - mu)``, and the
residuals get an ordinary XmR chart (limits from their own moving ranges, every run test as
usual).

Estimator
    Conditional least squares: ``phi`` and the intercept ``c = mu (1 - phi)`` from the ordinary
    least-squares regression of ``x_t`` on ``x_(t-1)`` for ``t = 2..n`` (the first reading has
    no predecessor and only serves as one); ``mu = c / (1 - phi)``. This is the estimate of
    ``statsmodels.tsa.ar_model.AutoReg(x, lags=1, trend="c")``. A fit with ``|phi| >= 1`` has
    no mean to return to (the readings wander like a random walk) and is refused; so is one
    whose ``mu`` falls outside the range of the readings, which is what a drifting history
    gives when ``phi`` comes out just below 1 (least squares biases ``phi`` down on a random
    walk; Dickey & Fuller 1979).
The first residual
    The first reading has no predecessor; its residual is ``sqrt(1 - phi^2) (x_1 - mu)``, which
    has the same variance as the others under the model (Prais & Winsten 1954). So ``n``
    readings give ``n`` residuals, and position ``p`` of a residual is position ``p`` of its
    reading (exclusions and signal indices point at the readings).
The residual baseline
    An ordinary XmR fit (:func:`limitwatch.stats.baseline.fit_baseline`) of the ``n``
    residuals, with the caller's method and exclusion settings. The AR(1) model itself is fitted
    on every reading given: a wild reading also bends ``phi``, so clean the history first.

What changes for the person reading the chart: limits, zones, run tests and signals refer to
the residuals, in the units of the readings, centered near 0. A lone special cause shows as
one large residual (and a second, opposite one on the next reading). A sustained shift of the
mean by ``delta`` shows as a residual of about ``delta`` on its first reading and only
``(1 - phi) delta`` afterwards, so with ``phi`` near 1 the residual chart sees a sustained shift
mostly at its onset (Harris & Ross 1991; Montgomery, chapter on autocorrelated data; cited from
memory). The planner's false-alarm figures apply to the residual chart as far as the residuals
are independent and normal.

>>> import numpy as np
>>> rng = np.random.default_rng(3)
>>> x = np.empty(400); x[0] = 0.0
>>> for t in range(1, 400):
...     x[t] = 0.8 * x[t - 1] + rng.normal()
>>> fit = fit_ar1(x + 60.0)
>>> round(fit.phi, 2), round(fit.mu, 1), len(fit.residuals)
(0.78, 60.2, 400)
>>> f = ResidualFilter(fit.phi, fit.mu)
>>> [round(f.update(v), 6) for v in x[:3] + 60.0] == [round(r, 6) for r in fit.residuals[:3]]
True

References
----------
Alwan, L. C. & Roberts, H. V. (1988). Time-series modeling for statistical process control.
*Journal of Business & Economic Statistics* 6(1), 87-95.
Montgomery, D. C. *Introduction to Statistical Quality Control*, chapter on SPC for
autocorrelated process data (residual control charts for an AR(1) model).
Box, G. E. P., Jenkins, G. M. & Reinsel, G. C. *Time Series Analysis: Forecasting and Control*
(conditional least squares for autoregressive models).
Prais, S. J. & Winsten, C. B. (1954). Trend estimators and serial correlation. Cowles
Commission Discussion Paper Stat. 383 (scaling the first observation by ``sqrt(1 - phi^2)``).
Dickey, D. A. & Fuller, W. A. (1979). Distribution of the estimators for autoregressive time
series with a unit root. *Journal of the American Statistical Association* 74, 427-431.
Harris, T. J. & Ross, W. H. (1991). Statistical process control procedures for correlated
observations. *Canadian Journal of Chemical Engineering* 69(1), 48-57.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from limitwatch.stats.baseline import (
    Baseline,
    BaselineError,
    Method,
    _lag1_autocorrelation,
    fit_baseline,
)

__all__ = [
    "ESTIMATOR",
    "Ar1Error",
    "Ar1Fit",
    "ResidualFilter",
    "fit_ar1",
    "one_step_residuals",
]

ESTIMATOR = "conditional least squares"
"""How :func:`fit_ar1` estimates ``phi`` and ``mu`` (named in every report)."""

PERSISTENT_PHI = 0.9
"""From this ``phi`` on a fit carries a warning that the residual chart sees a sustained shift
mostly at its onset (only ``1 - phi`` of it persists in the residuals)."""

RESIDUAL_AUTOCORRELATION = 0.3
"""Residuals whose lag-1 autocorrelation is still above this get a warning that one lag does
not capture the dependence (a rule of thumb, common practice; not a test)."""


class Ar1Error(BaselineError):
    """The readings cannot give a usable AR(1) model; the message says why and what to do."""


@dataclass(frozen=True, slots=True)
class Ar1Fit:
    """An AR(1) model of a baseline and the XmR baseline of its one-step-ahead residuals.

    ``residuals`` has one entry per reading (the first scaled by ``sqrt(1 - phi^2)``);
    ``innovation_sd`` is the regression's residual standard deviation
    (``sqrt(SSR / (n - 3))`` over the ``n - 1`` conditional residuals), for comparison with
    the residual baseline's sigma from moving ranges. ``lag1_autocorrelation`` is that of the
    readings, ``baseline.lag1_autocorrelation`` that of the residuals.
    """

    phi: float
    mu: float
    n: int
    innovation_sd: float
    lag1_autocorrelation: float | None
    residuals: tuple[float, ...]
    baseline: Baseline
    warnings: tuple[str, ...]

    @property
    def intercept(self) -> float:
        """``c`` of ``x_t = c + phi x_(t-1) + e_t``."""
        return self.mu * (1.0 - self.phi)

    def filter(self) -> ResidualFilter:
        """A fresh filter that turns later readings of the same stream into residuals."""
        return ResidualFilter(self.phi, self.mu)

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly numbers: the model, then the residual baseline (as
        :meth:`Baseline.to_dict` gives it). The residuals themselves are left out."""
        return {
            "estimator": ESTIMATOR,
            "phi": self.phi,
            "mu": self.mu,
            "intercept": self.intercept,
            "n": self.n,
            "innovation_sd": self.innovation_sd,
            "lag1_autocorrelation": self.lag1_autocorrelation,
            "residual_lag1_autocorrelation": self.baseline.lag1_autocorrelation,
            "residual_baseline": self.baseline.to_dict(),
            "warnings": list(self.warnings),
        }


class ResidualFilter:
    """One-step-ahead residuals of one stream, one reading at a time (O(1) state: the previous
    reading). Equal to :func:`one_step_residuals` over the same readings.

    >>> f = ResidualFilter(phi=0.5, mu=10.0)
    >>> f.update(12.0) == math.sqrt(0.75) * 2.0, f.update(13.0), f.update(10.0)
    (True, 2.0, -1.5)
    """

    __slots__ = ("_previous", "mu", "phi")

    def __init__(self, phi: float, mu: float) -> None:
        phi, mu = float(phi), float(mu)
        if not (math.isfinite(phi) and abs(phi) < 1.0):
            raise Ar1Error(f"phi must lie strictly between -1 and 1, got {phi!r}")
        if not math.isfinite(mu):
            raise Ar1Error(f"mu must be a finite number, got {mu!r}")
        self.phi = phi
        self.mu = mu
        self._previous: float | None = None

    def peek(self, value: float) -> float:
        """The residual ``value`` would have, without taking it as the previous reading (for a
        reading that will be refused)."""
        d = float(value) - self.mu
        if self._previous is None:
            return math.sqrt(1.0 - self.phi * self.phi) * d
        return d - self.phi * (self._previous - self.mu)

    def update(self, value: float) -> float:
        """The residual of ``value``; it becomes the previous reading for the next call."""
        e = self.peek(value)
        self._previous = float(value)
        return e


def one_step_residuals(values: ArrayLike, phi: float, mu: float) -> np.ndarray:
    """``e_t = x_t - mu - phi (x_(t-1) - mu)`` for every reading after the first, and
    ``sqrt(1 - phi^2) (x_1 - mu)`` for the first.

    >>> one_step_residuals([12.0, 13.0, 10.0], 0.5, 10.0)[1:].tolist()
    [2.0, -1.5]
    """
    ResidualFilter(phi, mu)  # the same checks of phi and mu
    d = np.asarray(values, dtype=float) - mu
    out = np.empty_like(d)
    if d.size:
        out[0] = math.sqrt(1.0 - phi * phi) * d[0]
        out[1:] = d[1:] - phi * d[:-1]
    return out


def _check(values: ArrayLike, min_points: int) -> np.ndarray:
    try:
        x = np.asarray(values, dtype=float)
    except (TypeError, ValueError) as exc:
        raise Ar1Error(f"readings must be numbers: {exc}") from exc
    if x.ndim != 1:
        raise Ar1Error(f"readings must be a flat sequence, got an array of shape {x.shape}")
    need = max(min_points, 3)
    if x.size < need:
        raise Ar1Error(
            f"only {x.size} readings, fewer than the {need} an AR(1) fit and its residual "
            "limits need; collect more or lower min_points"
        )
    bad = np.flatnonzero(~np.isfinite(x))
    if bad.size:
        p = int(bad[0])
        raise Ar1Error(f"reading at position {p} is {float(x[p])!r}, not a finite number")
    return x


def fit_ar1(
    values: ArrayLike,
    *,
    method: Method = "mean",
    exclude_beyond: bool = False,
    max_iterations: int = 5,
    min_points: int = 10,
    warn_points: int = 20,
) -> Ar1Fit:
    """Fit ``x_t - mu = phi (x_(t-1) - mu) + e_t`` by conditional least squares, and an XmR
    baseline of the one-step-ahead residuals (the keyword arguments go to that fit).

    Raises :class:`Ar1Error` (a :class:`~limitwatch.stats.baseline.BaselineError`) when the
    readings cannot give a model: too few, not finite, not varying, or ``|phi| >= 1``.

    >>> fit = fit_ar1([5.0, 6.0, 5.5, 7.0, 6.5, 6.0, 5.0, 5.5, 6.5, 7.0, 6.0, 5.5])
    >>> round(fit.phi, 3), round(fit.mu, 3), fit.baseline.n
    (0.15, 6.053, 12)

    References
    ----------
    Box, Jenkins & Reinsel, *Time Series Analysis* (conditional least squares);
    Alwan & Roberts (1988), *J. Business & Economic Statistics* 6(1), 87-95.
    """
    x = _check(values, min_points)
    ref = float(x[0])
    y = x - ref  # exact for readings close together, so no offset leaks into the sums
    prev, cur = y[:-1], y[1:]
    m_prev, m_cur = float(np.mean(prev)), float(np.mean(cur))
    dp = prev - m_prev
    sxx = float(np.dot(dp, dp))
    if sxx == 0.0:
        raise Ar1Error(
            "the readings do not vary, so no AR(1) model can be fitted; check the sensor or "
            "record more digits"
        )
    phi = float(np.dot(dp, cur - m_cur)) / sxx
    if not abs(phi) < 1.0:
        raise Ar1Error(
            f"the AR(1) fit gives phi = {phi:.3f}, not between -1 and 1: the readings wander "
            "without returning to a mean (like a random walk), so there is no in-control "
            "level to chart residuals around; fit on a steadier stretch, or find what drifts"
        )
    c = m_cur - phi * m_prev
    mu_y = c / (1.0 - phi)
    low, high = float(np.min(y)), float(np.max(y))
    if not low <= mu_y <= high:
        raise Ar1Error(
            f"the AR(1) fit (phi = {phi:.3f}) puts the mean at {ref + mu_y:.6g}, outside the "
            f"readings ({ref + low:.6g} to {ref + high:.6g}): they drift rather than return "
            "to a level (like a random walk), or are too few to show the level they return "
            "to, so there is no in-control level to chart residuals around; fit on a longer "
            "or steadier stretch, or find what drifts"
        )
    conditional = cur - c - phi * prev
    dof = conditional.size - 2
    innovation_sd = math.sqrt(float(np.dot(conditional, conditional)) / dof) if dof > 0 else 0.0
    residuals = one_step_residuals(y, phi, mu_y)
    lag1 = _lag1_autocorrelation(y)
    baseline = fit_baseline(
        residuals,
        method=method,
        exclude_beyond=exclude_beyond,
        max_iterations=max_iterations,
        min_points=min_points,
        warn_points=warn_points,
        autocorrelation_threshold=1.0,  # warned about below, in words that fit residuals
    )
    warnings: list[str] = []
    rest = baseline.lag1_autocorrelation
    if rest is not None and abs(rest) > RESIDUAL_AUTOCORRELATION:
        warnings.append(
            f"the residuals are still autocorrelated (lag-1 {rest:.2f}): one lag does not "
            "capture how the readings depend on each other, so the residual limits may still "
            "be too tight"
        )
    if phi >= PERSISTENT_PHI:
        warnings.append(
            f"phi is {phi:.2f}: after a sustained shift only {1 - phi:.2f} of it stays in the "
            "residuals, so the residual chart shows such a shift mostly at its first reading"
        )
    return Ar1Fit(
        phi=phi,
        mu=ref + mu_y,
        n=int(x.size),
        innovation_sd=innovation_sd,
        lag1_autocorrelation=lag1,
        residuals=tuple(float(e) for e in residuals),
        baseline=baseline,
        warnings=tuple(warnings),
    )
