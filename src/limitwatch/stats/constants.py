"""Bias-correction factors for moving ranges of two, derived from the normal model in closed form.

Why derive instead of copying a table: printed tables round each factor to three or four digits
and some factors are built from already-rounded ones (``E2 = 3/1.128`` prints 2.660 although
``3/d2`` is 2.6587). Deriving them keeps every limit consistent with every other to full double
precision, and the tests compare the results with the printed tables and with numerical
integration.

For two independent readings ``X1, X2 ~ N(mu, sigma^2)`` the difference ``X1 - X2`` is
``N(0, 2 sigma^2)``, so the moving range ``|X1 - X2| / sigma`` is half-normal with scale
``sqrt(2)``. Its mean, standard deviation and median give all the factors below:

* ``E|X1 - X2| / sigma = sqrt(2) * sqrt(2/pi) = 2/sqrt(pi)``  (d2)
* ``E(X1 - X2)^2 / sigma^2 = 2``, so ``sd |X1 - X2| / sigma = sqrt(2 - 4/pi)``  (d3)
* ``median |X1 - X2| / sigma = sqrt(2) * Phi^-1(0.75)``

>>> round(D2, 3), round(D3_SD, 3), round(D4, 3)
(1.128, 0.853, 3.267)
>>> round(MEDIAN_X_FACTOR, 3)
3.145

References
----------
Montgomery, D. C., *Introduction to Statistical Quality Control*, Appendix VI (factors for
constructing variables control charts).
ASTM E2587, *Standard Practice for Use of Control Charts in Statistical Process Control*, and
ASTM MNL 7, *Manual on Presentation of Data and Control Chart Analysis*.
Wheeler, D. J., *Advanced Topics in Statistical Process Control* (limits from the median moving
range).
"""

from __future__ import annotations

import math
from statistics import NormalDist

D2: float = 2.0 / math.sqrt(math.pi)
"""d2: expected moving range of two readings in sigma units; ``sigma = MRbar / D2``."""

D3_SD: float = math.sqrt(2.0 - 4.0 / math.pi)
"""d3: standard deviation of the moving range of two readings in sigma units."""

E2: float = 3.0 / D2
"""E2: natural process limits are ``center +- E2 * MRbar`` (three sigma)."""

D3: float = max(0.0, 1.0 - 3.0 * D3_SD / D2)
"""D3: lower moving-range limit factor. ``1 - 3 d3/d2`` is negative for ranges of two, so 0."""

D4: float = 1.0 + 3.0 * D3_SD / D2
"""D4: upper moving-range limit is ``D4 * MRbar``."""

MR_UCL_SIGMA: float = D2 + 3.0 * D3_SD
"""Upper moving-range limit in sigma units (``d2 + 3 d3``); ``MR UCL = MR_UCL_SIGMA * sigma``."""

MEDIAN_MR_D: float = math.sqrt(2.0) * NormalDist().inv_cdf(0.75)
"""Median moving range of two readings in sigma units; ``sigma = median MR / MEDIAN_MR_D``."""

MEDIAN_X_FACTOR: float = 3.0 / MEDIAN_MR_D
"""X-chart factor for the median moving range: limits ``center +- MEDIAN_X_FACTOR * median MR``."""

MEDIAN_MR_UCL_FACTOR: float = MR_UCL_SIGMA / MEDIAN_MR_D
"""Upper moving-range limit from the median moving range: ``MEDIAN_MR_UCL_FACTOR * median MR``."""


def factor_table() -> dict[str, float]:
    """Every factor by a readable name, for display (``limitwatch`` commands, reports).

    >>> table = factor_table()
    >>> round(table["E2"], 3), table["D3"]
    (2.659, 0.0)
    """
    return {
        "d2": D2,
        "d3": D3_SD,
        "E2": E2,
        "D3": D3,
        "D4": D4,
        "mr_ucl_sigma": MR_UCL_SIGMA,
        "median_mr_d": MEDIAN_MR_D,
        "median_x_factor": MEDIAN_X_FACTOR,
        "median_mr_ucl_factor": MEDIAN_MR_UCL_FACTOR,
    }
