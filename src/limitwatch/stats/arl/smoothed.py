"""Exact run lengths of the EWMA and of the two-sided CUSUM (each optionally with
``beyond-limits``): Brook & Evans cells over the detector's continuous state.

Why: a smoothed statistic has a continuous state, which Brook & Evans (1972) cut into cells,
each standing for its middle; two cell counts and Richardson extrapolation remove the leading
cell-size error.

* ``ewma``: cells over the asymptotic band, with the detector's own start-up limits stepped
  through exactly (they are time-varying until they settle) (Lucas & Saccucci 1990).
* ``cusum``: cells over both sums ``(C+, C-)`` (two-sided, with the head start) (Lucas &
  Crosier 1982).

References
----------
Brook, D. & Evans, D. A. (1972). An approach to the probability distribution of CUSUM run
length. *Biometrika* 59(3), 539-549.
Lucas, J. M. & Saccucci, M. S. (1990). Exponentially weighted moving average control schemes:
properties and enhancements. *Technometrics* 32(1), 1-12.
Lucas, J. M. & Crosier, R. B. (1982). Fast initial response for CUSUM quality-control schemes.
*Technometrics* 24(3), 199-205.
Montgomery, D. C. *Introduction to Statistical Quality Control*, chapters on CUSUM and EWMA
charts and on average run length.
"""

from __future__ import annotations

import math

import numpy as np

from limitwatch.stats.arl.common import _mass, _moments, _quasi_stationary, _summarise

_EWMA_CELLS = 50  # Brook & Evans cells (2 n + 1 and 4 n + 1 of them, times resolution)
_CUSUM_CELLS = 30  # cells per sum (n and 2 n of them, times resolution)
_SETTLED = 1e-13  # EWMA start-up limits count as asymptotic once (1 - lam)^(2n) is below this


# -- EWMA ------------------------------------------------------------------------------------------


def _ewma_chain(
    lam: float,
    big_l: float,
    exact_startup: bool,
    k: float | None,
    shift: float,
    steady: bool,
    half_cells: int,
) -> tuple[float, float, int]:
    cells = 2 * half_cells + 1  # odd: the middle cell is centred on the start value 0
    var = lam / (2.0 - lam)
    band = big_l * math.sqrt(var)
    width = 2.0 * band / cells
    edges = -band + width * np.arange(cells + 1)
    mids = edges[:-1] + width / 2.0
    keep = 1.0 - lam
    base = keep * mids[:, None]
    lo = np.broadcast_to(edges[None, :-1], (cells, cells)).copy()
    hi = np.broadcast_to(edges[None, 1:], (cells, cells)).copy()
    if k is not None:  # the reading itself must stay within +-k
        lo = np.maximum(lo, base - lam * k)
        hi = np.minimum(hi, base + lam * k)

    def matrix(d: float, limit: float = band, cols: np.ndarray | slice = slice(None)) -> np.ndarray:
        low = (np.maximum(lo[:, cols], -limit) - base) / lam - d
        return _mass(low, (np.minimum(hi[:, cols], limit) - base) / lam - d)

    q = matrix(shift)
    if steady:
        m1, m2 = _moments(q)
        pi = _quasi_stationary(matrix(0.0))
        e1, e2 = float(pi @ m1), float(pi @ m2)
        return e1, math.sqrt(max(e2 - e1 * e1, 0.0)), cells
    steps = 0
    if exact_startup and keep > 0.0:
        steps = max(1, math.ceil(math.log(_SETTLED) / (2.0 * math.log(keep))))
    p = np.zeros(cells)
    p[half_cells] = 1.0
    head1 = head2 = 0.0
    for t in range(steps):
        alive = float(p.sum())
        head1 += alive
        head2 += (2 * t + 1) * alive
        limit = big_l * math.sqrt(var * (1.0 - keep ** (2 * (t + 1))))
        cut = (edges[:-1] < -limit) | (edges[1:] > limit)  # cells the limit passes through
        qt = q.copy()
        qt[:, cut] = matrix(shift, limit, np.flatnonzero(cut))
        p = p @ qt
    m1, m2 = _moments(q)
    e1 = head1 + float(p @ m1)
    e2 = head2 + 2 * steps * float(p @ m1) + float(p @ m2)
    return e1, math.sqrt(max(e2 - e1 * e1, 0.0)), cells


# -- CUSUM -----------------------------------------------------------------------------------------


def _cusum_chain(
    k: float,
    h: float,
    headstart: float,
    k_limit: float | None,
    shift: float,
    steady: bool,
    cells: int,
) -> tuple[float, float, int]:
    """Brook & Evans over both sums. Cell 0 of each sum is ``[0, w/2]`` (it holds the atom at
    0), cell ``j`` ends at ``(j + 1/2) w`` and the last one at ``h``; a state stands for the
    middle of its cell. From a cell middle every breakpoint of the next reading (where a sum
    crosses a cell edge) lies on one of two lattices ``+-k + (m + 1/2) w``, so one set of
    intervals of the next reading serves every state; the start row uses the exact head start.
    """
    width = 2.0 * h / (2 * cells - 1)
    upper = (np.arange(cells) + 0.5) * width
    lattice = (np.arange(-cells - 1, cells + 1) + 0.5) * width
    extra = [] if k_limit is None else [-k_limit, k_limit]

    def intervals(cuts: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        z = np.unique(np.concatenate([cuts, extra]))
        lo = np.concatenate([[-np.inf], z])
        hi = np.concatenate([z, [np.inf]])
        mid = np.where(np.isinf(lo), hi - 1.0, np.where(np.isinf(hi), lo + 1.0, (lo + hi) / 2.0))
        return lo, hi, mid

    def targets(u: np.ndarray, v: np.ndarray, mid: np.ndarray) -> np.ndarray:
        """Next cell (``a * cells + b``) for states ``(u, v)`` and readings ``mid``; -1: signal."""
        a = np.searchsorted(upper, np.maximum(0.0, u[:, None] + mid[None, :] - k))
        b = np.searchsorted(upper, np.maximum(0.0, v[:, None] - mid[None, :] - k))
        ok = (a < cells) & (b < cells)
        if k_limit is not None:
            ok &= np.abs(mid) <= k_limit
        return np.where(ok, a * cells + b, -1)

    lo, hi, mid = intervals(np.concatenate([k + lattice, -k + lattice]))
    s_lo, s_hi, s_mid = intervals(np.concatenate([upper - headstart + k, headstart - k - upper]))
    start_row = targets(np.array([headstart]), np.array([headstart]), s_mid)[0]
    # Breadth first over the cells reachable from the start.
    seen = np.zeros(cells * cells, dtype=bool)
    found = np.unique(start_row[start_row >= 0])
    seen[found] = True
    cells_in_order = [found]
    rows = []
    frontier = found
    while frontier.size:
        block = targets((frontier // cells) * width, (frontier % cells) * width, mid)
        rows.append(block)
        nxt = np.unique(block[block >= 0])
        nxt = nxt[~seen[nxt]]
        seen[nxt] = True
        if nxt.size:
            cells_in_order.append(nxt)
        frontier = nxt
    grid = np.concatenate(cells_in_order)
    table = np.concatenate(rows)  # one row per cell of ``grid``, in the same order
    n = grid.size + 1  # state 0 is the start
    index = np.full(cells * cells, -1, dtype=np.int64)
    index[grid] = np.arange(1, n)
    src, col = np.nonzero(table >= 0)
    dst = index[table[src, col]]
    s_col = np.flatnonzero(start_row >= 0)
    s_dst = index[start_row[s_col]]

    def matrix(d: float) -> np.ndarray:
        q = np.zeros((n, n))
        np.add.at(q, (src + 1, dst), _mass(lo - d, hi - d)[col])
        np.add.at(q[0], s_dst, _mass(s_lo - d, s_hi - d)[s_col])
        return q

    q = matrix(shift)
    arl, sd = _summarise(matrix(0.0) if steady else q, q, 0, steady)
    return arl, sd, n
