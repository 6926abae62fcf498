"""What every run-length method shares: the result type, the error, the normal distribution
without scipy, and solving a Markov chain for the first two moments of its absorption time.

Why apart: the zone, moving-range, EWMA and CUSUM chains all end in the same ``(I - Q)^-1``
solve (Brook & Evans 1972), and the simulation and the cache return the same result type.

References
----------
Brook, D. & Evans, D. A. (1972). An approach to the probability distribution of CUSUM run
length. *Biometrika* 59(3), 539-549.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from limitwatch.stats.rules import RuleSpec

_MAX_STATES = 6_000  # larger exact chains are simulated instead (a dense solve grows as n^3)


class ArlError(ValueError):
    """A run length that cannot be computed as asked; the message says what would work."""


class _TooLarge(ArlError):
    """An exact chain would have more states than :data:`_MAX_STATES`."""


def _guard(states: int) -> None:
    if states > _MAX_STATES:
        raise _TooLarge(f"the exact chain would need more than {_MAX_STATES} states")


@dataclass(frozen=True, slots=True)
class RunLength:
    """Mean and standard deviation of the run length, and how they were obtained.

    ``standard_error`` and ``runs`` are set for simulated results only; ``states`` is the size
    of the (largest) Markov chain solved for exact ones. ``sd`` is the sample standard
    deviation for simulated results.
    """

    arl: float
    sd: float | None
    method: Literal["exact", "simulated"]
    standard_error: float | None = None
    runs: int | None = None
    states: int | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "arl": self.arl,
            "sd": self.sd,
            "method": self.method,
            "standard_error": self.standard_error,
            "runs": self.runs,
            "states": self.states,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> RunLength:
        method = data["method"]
        if method not in ("exact", "simulated"):
            raise ValueError(f"unknown run-length method {method!r}")

        def opt(name: str, kind: type) -> Any:
            value = data.get(name)
            return None if value is None else kind(value)

        return cls(
            arl=float(data["arl"]),
            sd=opt("sd", float),
            method=method,
            standard_error=opt("standard_error", float),
            runs=opt("runs", int),
            states=opt("states", int),
        )


# -- the normal distribution without scipy ---------------------------------------------------------

_SQRT2 = math.sqrt(2.0)
_erfc = np.frompyfunc(math.erfc, 1, 1)


def _upper_tail(x: np.ndarray) -> np.ndarray:
    """P(Z > x), accurate far into both tails."""
    return np.asarray(_erfc(np.asarray(x, dtype=float) / _SQRT2), dtype=float) * 0.5


def _mass(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """P(lo < Z < hi) for arrays of bounds (infinite allowed); 0 where ``hi <= lo``."""
    lo, hi = np.broadcast_arrays(np.asarray(lo, dtype=float), np.asarray(hi, dtype=float))
    right = lo > 0.0  # in the upper tail use P(Z > lo) - P(Z > hi), else mirror the interval
    mass = _upper_tail(np.where(right, lo, -hi)) - _upper_tail(np.where(right, hi, -lo))
    return np.where(hi > lo, np.maximum(mass, 0.0), 0.0)


def _pdf(x: np.ndarray) -> np.ndarray:
    return np.exp(-0.5 * x * x) / math.sqrt(2.0 * math.pi)


# -- solving a chain -------------------------------------------------------------------------------


def _moments(q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Expected run length and expected squared run length from every state."""
    a = np.eye(q.shape[0]) - q
    m1 = np.linalg.solve(a, np.ones(q.shape[0]))
    m2 = np.linalg.solve(a, 2.0 * m1 - 1.0)
    return m1, m2


def _quasi_stationary(q: np.ndarray) -> np.ndarray:
    """Distribution of the state after a long time without a signal: the left Perron vector of
    the in-control chain, by power iteration on ``(I - Q)^-1`` (its top eigenvalue ``ARL0`` is
    far above the others, so a few dozen products settle it)."""
    inverse = np.linalg.inv(np.eye(q.shape[0]) - q)
    v = np.full(q.shape[0], 1.0 / q.shape[0])
    for _ in range(500):
        nxt = v @ inverse
        nxt /= nxt.sum()
        if np.max(np.abs(nxt - v)) < 1e-15:
            return nxt
        v = nxt
    return v


def _summarise(
    q0: np.ndarray, q: np.ndarray, start: int | np.ndarray, steady: bool
) -> tuple[float, float]:
    """ARL and SD from ``start`` (a state index or a distribution over states)."""
    m1, m2 = _moments(q)
    weights = _quasi_stationary(q0) if steady else start
    if isinstance(weights, int | np.integer):
        e1, e2 = float(m1[weights]), float(m2[weights])
    else:
        e1, e2 = float(weights @ m1), float(weights @ m2)
    return e1, math.sqrt(max(e2 - e1 * e1, 0.0))


def _richardson(coarse: float, fine: float, h_coarse: float, h_fine: float) -> float:
    """Remove the ``h^2`` term of a cell-size error from two results."""
    return (h_coarse**2 * fine - h_fine**2 * coarse) / (h_coarse**2 - h_fine**2)


def _label(specs: Iterable[RuleSpec]) -> str:
    return ", ".join(str(s) for s in specs)
