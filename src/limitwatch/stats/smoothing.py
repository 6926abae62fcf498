"""EWMA and tabular CUSUM detectors for the individuals chart, in standardized units.

Why these beside the run tests: a Shewhart chart with run tests reacts fast to large shifts but
is slow to notice a sustained shift of one sigma or less. The EWMA and the CUSUM accumulate
evidence over many readings and are the standard remedy for small persistent shifts.

Both detectors follow the conventions of :mod:`limitwatch.stats.rules`:

* ``update(index, z)`` takes ``z = (x - center) / sigma`` and the reading's 0-based position;
  positions must increase by exactly one per call (``reset()`` lifts that until the next call).
  A non-finite ``z`` raises :class:`ValueError` and leaves the state untouched.
* Start-up: the EWMA starts at ``w = 0`` and the CUSUM sums at the head start (0 by default).
* Restart: a detector that signals starts again from its start-up state, forgetting every
  reading up to and including the one that completed the signal. The EWMA goes back to
  ``w = 0`` and its start-up limit clock to zero; the CUSUM sums go back to the head start
  (0 unless a fast-initial-response head start was chosen; Lucas & Crosier use the head start
  again after a signal, which is its purpose: a shift that persists is flagged again quickly).

References
----------
Roberts, S. W. (1959). Control chart tests based on geometric moving averages.
*Technometrics* 1(3), 239-250.
Lucas, J. M. & Saccucci, M. S. (1990). Exponentially weighted moving average control schemes:
properties and enhancements. *Technometrics* 32(1), 1-12.
Page, E. S. (1954). Continuous inspection schemes. *Biometrika* 41(1/2), 100-115.
Lucas, J. M. & Crosier, R. B. (1982). Fast initial response for CUSUM quality-control schemes:
give your CUSUM a head start. *Technometrics* 24(3), 199-205.
Montgomery, D. C. *Introduction to Statistical Quality Control*, chapter on CUSUM and EWMA
control charts.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
from typing import Any, ClassVar

from limitwatch.stats.signal import Chart, Side, Signal, Stateful, refuse_reading

_isfinite = math.isfinite
_EWMA_WEIGHT_SHARE = 0.99
"""Share of the EWMA statistic's weight that the readings in a signal's ``involved`` carry."""


MAX_SIGMAS = 10.0
"""Largest EWMA limit width ``L`` and CUSUM reference value ``k``, in sigma (the same bound as
the run tests' boundaries: wider can never signal)."""
MIN_LAM = 0.01
"""Smallest EWMA weight: published designs use 0.05 to 0.25 (common practice); below 0.01 the
statistic remembers hundreds of readings and the planner's chain takes most of a minute."""
MAX_CUSUM_H = 50.0
"""Largest CUSUM decision interval ``h``, in sigma; published designs use 4 to 5 (common
practice), and ``h=50`` already means an in-control run length beyond any plant's lifetime."""


def _number(name: str, value: Any, low: float, high: float, *, open_low: bool) -> float:
    x = float(value)
    if not (_isfinite(x) and (x > low if open_low else x >= low) and x <= high):
        bound = "(" if open_low else "["
        raise ValueError(f"{name} must be a number in {bound}{low}, {high}], got {value!r}")
    return x


@functools.lru_cache(maxsize=256)
def _ewma_constants(lam: float, L: float) -> tuple[float, float, float, int, int]:
    """``(keep, var, asymptotic limit, weight span, settled n)`` for one ``(lam, L)``.

    Computed once per parameter pair and shared, so that each stream's EWMA neither repeats the
    logarithms at construction (a restart builds one per stream) nor keeps its own copies.
    """
    keep = 1.0 - lam
    var = lam / (2.0 - lam)
    return keep, var, L * math.sqrt(var), _weight_span(keep), _settled_after(keep)


def _settled_after(keep: float) -> int:
    """First ``n`` from which ``1 - keep^(2n)`` rounds to exactly 1.0.

    From there on the exact start-up limit ``L * sqrt(var * (1 - keep^(2n)))`` is bit for bit
    the asymptotic ``L * sqrt(var)``, and stays so (``keep^(2n)`` only shrinks), so
    :meth:`Ewma.update` may skip the power and the square root without changing any result.
    """
    if keep == 0.0:
        return 1
    n = max(1, math.ceil(math.log(2.0**-54) / (2.0 * math.log(keep))))
    while n > 1 and 1.0 - keep ** (2 * (n - 1)) == 1.0:  # guard the logarithms' rounding
        n -= 1
    while 1.0 - keep ** (2 * n) != 1.0:
        n += 1
    return n


def _weight_span(keep: float) -> int:
    """Fewest most recent readings whose EWMA weights ``1 - keep^m`` reach the share above."""
    rest = 1.0 - _EWMA_WEIGHT_SHARE
    if keep <= rest:
        return 1
    m = max(1, math.ceil(math.log(rest) / math.log(keep)))
    while m > 1 and keep ** (m - 1) <= rest:  # guard the logarithms' rounding
        m -= 1
    while keep**m > rest:
        m += 1
    return m


class Ewma(Stateful):
    """Exponentially weighted moving average of the standardized readings.

    ``w_i = lam * z_i + (1 - lam) * w_(i-1)``, ``w_0 = 0``; a signal when ``|w_i|`` exceeds
    ``L * sqrt(lam / (2 - lam) * (1 - (1 - lam)^(2 n)))``, where ``n`` counts readings since the
    start or the last restart. With ``exact_startup=False`` the asymptotic limit
    ``L * sqrt(lam / (2 - lam))`` is used from the first reading (as in Lucas & Saccucci's
    tables); exact start-up limits are narrower at first and so catch a shift present from the
    start sooner, at the price of a slightly shorter in-control ARL.

    Defaults ``lam=0.2, L=2.962`` give an in-control ARL of about 500 with asymptotic limits
    (Lucas & Saccucci 1990, as tabled by Montgomery; from memory).

    ``involved`` lists the most recent readings since the last restart that together carry 99%
    of the statistic's weight (``ceil(log 0.01 / log(1 - lam))`` readings: 21 for ``lam=0.2``),
    so that a signal after months without one does not list millions of positions.

    >>> det = Ewma(lam=0.5, L=2.0)
    >>> [det.update(i, z) for i, z in enumerate([0.5, 1.0])]
    [None, None]
    >>> s = det.update(2, 3.0)
    >>> s.side, s.statistic, round(s.limit, 3), s.involved  # w = 1.5 + 0.5 * (0.5 + 0.5 * 0.25)
    ('upper', 1.8125, 1.146, (0, 1, 2))

    References
    ----------
    Roberts (1959), *Technometrics* 1(3); Lucas & Saccucci (1990), *Technometrics* 32(1);
    Montgomery, *Introduction to Statistical Quality Control*, EWMA control chart.
    """

    __slots__ = (
        "L",
        "_asymptotic",
        "_keep",
        "_last",
        "_n",
        "_settled",
        "_span",
        "_var",
        "_w",
        "exact_startup",
        "lam",
    )
    _last: int | None
    _n: int
    _w: float
    rule: ClassVar[str] = "ewma"
    chart: ClassVar[Chart] = "x"
    _params = ("lam", "L", "exact_startup")
    _state = ("_w", "_n", "_last")

    def __init__(self, lam: float = 0.2, L: float = 2.962, exact_startup: bool = True) -> None:
        self.lam = _number("lam", lam, MIN_LAM, 1.0, open_low=False)
        self.L = _number("L", L, 0.0, MAX_SIGMAS, open_low=True)
        if not isinstance(exact_startup, bool):
            raise ValueError(f"exact_startup must be true or false, got {exact_startup!r}")
        self.exact_startup = exact_startup
        constants = _ewma_constants(self.lam, self.L)
        self._keep, self._var, self._asymptotic, self._span, self._settled = constants
        if not exact_startup:
            self._settled = 0  # the asymptotic limit from the first reading
        self.reset()

    def limit(self, n: int) -> float:
        """Control limit (in sigma units) for the ``n``-th reading since start or restart."""
        if not self.exact_startup:
            return self._asymptotic
        return self.L * math.sqrt(self._var * (1.0 - self._keep ** (2 * n)))

    def update(self, index: int, value: float) -> Signal | None:
        last = self._last
        if not _isfinite(value) or (last is not None and index != last + 1):
            refuse_reading(self.rule, last, index, value)
        self._last = index
        w = self.lam * value + self._keep * self._w
        n = self._n + 1
        if n >= self._settled:  # also every n when exact_startup is off
            limit = self._asymptotic
        else:
            limit = self.L * math.sqrt(self._var * (1.0 - self._keep ** (2 * n)))
        if w > limit or w < -limit:
            self._w, self._n = 0.0, 0
            side: Side = "upper" if w > 0 else "lower"
            bound = limit if w > 0 else -limit
            first = index - min(n, self._span) + 1
            return Signal(self.rule, "x", side, index, tuple(range(first, index + 1)), w, bound)
        self._w, self._n = w, n
        return None

    def reset(self) -> None:
        self._w, self._n, self._last = 0.0, 0, None

    def _load(self, values: Sequence[Any]) -> None:
        w, n, last = values
        self._w, self._n, self._last = float(w), int(n), last

    def __repr__(self) -> str:
        return f"Ewma(lam={self.lam!r}, L={self.L!r}, exact_startup={self.exact_startup!r})"


class Cusum(Stateful):
    """Two-sided tabular CUSUM of the standardized readings.

    ``C+ = max(0, C+ + z - k)`` and ``C- = max(0, C- - z - k)``; a signal when either exceeds
    ``h`` (side ``upper`` for ``C+``, ``lower`` for ``C-``; ``statistic`` is that sum, ``limit``
    is ``h``). ``k`` is half the shift to detect, in sigma; ``k=0.5, h=5`` (defaults) gives an
    in-control ARL of about 465 and an ARL of about 10.4 for a one-sigma shift (Montgomery's
    table; from memory). ``headstart`` (fast initial response, Lucas & Crosier 1982; ``h/2`` is
    their usual choice) is where both sums start, at the beginning and after every signal.

    ``involved`` lists the readings since the signalling sum last left zero (or since the start
    or last restart, when a head start kept it above zero).

    >>> det = Cusum(k=0.5, h=2.0)
    >>> [det.update(i, z) for i, z in enumerate([-1.0, 1.5, 1.0])]
    [None, None, None]
    >>> s = det.update(3, 1.2)
    >>> s.side, round(s.statistic, 2), s.limit, s.involved
    ('upper', 2.2, 2.0, (1, 2, 3))

    References
    ----------
    Page (1954), *Biometrika* 41; Lucas & Crosier (1982), *Technometrics* 24(3);
    Montgomery, *Introduction to Statistical Quality Control*, tabular CUSUM.
    """

    __slots__ = ("_down", "_down_len", "_last", "_up", "_up_len", "h", "headstart", "k")
    _down: float
    _down_len: int
    _last: int | None
    _up: float
    _up_len: int
    rule: ClassVar[str] = "cusum"
    chart: ClassVar[Chart] = "x"
    _params = ("k", "h", "headstart")
    _state = ("_up", "_down", "_up_len", "_down_len", "_last")

    def __init__(self, k: float = 0.5, h: float = 5.0, headstart: float = 0.0) -> None:
        self.k = _number("k", k, 0.0, MAX_SIGMAS, open_low=False)
        self.h = _number("h", h, 0.0, MAX_CUSUM_H, open_low=True)
        self.headstart = _number("headstart", headstart, 0.0, self.h, open_low=False)
        if self.headstart == self.h:
            raise ValueError(f"headstart must be below h={self.h}, got {headstart!r}")
        self.reset()

    def update(self, index: int, value: float) -> Signal | None:
        last = self._last
        if not _isfinite(value) or (last is not None and index != last + 1):
            refuse_reading(self.rule, last, index, value)
        self._last = index
        up = self._up + value - self.k
        down = self._down - value - self.k
        if up > 0.0:
            up_len = self._up_len + 1
        else:
            up, up_len = 0.0, 0
        if down > 0.0:
            down_len = self._down_len + 1
        else:
            down, down_len = 0.0, 0
        if up > self.h or down > self.h:
            self._restart()
            side: Side = "upper" if up > self.h else "lower"
            stat, n = (up, up_len) if up > self.h else (down, down_len)
            return Signal(
                self.rule, "x", side, index, tuple(range(index - n + 1, index + 1)), stat, self.h
            )
        self._up, self._down, self._up_len, self._down_len = up, down, up_len, down_len
        return None

    def _restart(self) -> None:
        self._up = self._down = self.headstart
        self._up_len = self._down_len = 0

    def reset(self) -> None:
        self._restart()
        self._last = None

    def _load(self, values: Sequence[Any]) -> None:
        up, down, up_len, down_len, last = values
        self._up, self._down = float(up), float(down)
        self._up_len, self._down_len, self._last = int(up_len), int(down_len), last

    def __repr__(self) -> str:
        return f"Cusum(k={self.k!r}, h={self.h!r}, headstart={self.headstart!r})"


SMOOTHERS: dict[str, type[Ewma] | type[Cusum]] = {Ewma.rule: Ewma, Cusum.rule: Cusum}
"""The accumulating detectors by id (the run tests are in :data:`limitwatch.stats.rules.RULES`)."""
