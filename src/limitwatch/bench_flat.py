"""The bench's yardstick: the engine's work with no design at all.

``limitwatch bench`` compares :class:`~limitwatch.engine.StreamMonitor` with this plain
function, which does the same job for the same rules and parameters (``nelson,ewma,cusum`` at
their defaults) on the same readings: it refuses readings out of time order or not finite, takes
the moving range, places ``z`` and runs every test inline, with each stream's state in one flat
list. No objects per detector, no checkpoints, no configuration, no outcome records. How far the
engine stays behind it is the price of its design (small detectors, snapshots, settings), and
that price is what the bench reports.

It is a measuring stick, not a second engine: nothing else uses it, and the bench checks that it
raises exactly the signals the engine raises (rule, side and position) before quoting a ratio.
"""

from __future__ import annotations

import math
from typing import Any

from limitwatch.stats.constants import MR_UCL_SIGMA

_LAM, _L = 0.2, 2.962
_KEEP = 1.0 - _LAM
_VAR = _LAM / (2.0 - _LAM)
_EWMA_ASYMPTOTIC = _L * math.sqrt(_VAR)
_CUSUM_K, _CUSUM_H = 0.5, 5.0
_MR_LIMIT = MR_UCL_SIGMA


def _settled() -> int:
    n = 1
    while 1.0 - _KEEP ** (2 * n) != 1.0:
        n += 1
    return n


_EWMA_SETTLED = _settled()


def new_state(center: float, sigma: float) -> list[Any]:
    """One stream's state: time and value of the last reading, its position, the baseline,
    then each test's counters."""
    #       t     x     n  center  sigma  a_up a_dn b_up b_dn run trend prev  alt step prev2
    return [None, None, 0, center, sigma, 0, 0, 0, 0, 0, 0, None, 0, 0, None,
            # hug avoid ewma_w ewma_n cusum_up cusum_dn and their lengths
            0, 0, 0.0, 0, 0.0, 0.0, 0, 0]  # fmt: skip


def flat_update(state: list[Any], time: float, x: float) -> tuple[tuple[str, str, int], ...]:
    """Apply one reading; return ``(rule, side, position)`` for each test that fired, in the
    engine's order (Nelson's tests as the preset lists them, EWMA, CUSUM, moving range)."""
    (last_t, last_x, n, center, sigma, a_up, a_dn, b_up, b_dn, run, trend, prev, alt, step,
     prev2, hug, avoid, w, wn, cu, cd, cu_n, cd_n) = state  # fmt: skip
    if not (math.isfinite(x) and math.isfinite(time)):
        return (("refused", "not-finite", n),)
    if last_t is not None and time <= last_t:
        return (("refused", "out-of-order", n),)
    z = (x - center) / sigma
    hits: list[tuple[str, str, int]] = []
    # beyond-limits
    if z > 3.0:
        hits.append(("beyond-limits", "upper", n))
    elif z < -3.0:
        hits.append(("beyond-limits", "lower", n))
    # run-one-side, 9
    if z > 0.0:
        run = run + 1 if run > 0 else 1
    elif z < 0.0:
        run = run - 1 if run < 0 else -1
    else:
        run = 0
    if run >= 9 or run <= -9:
        hits.append(("run-one-side", "upper" if run > 0 else "lower", n))
        run = 0
    # trend, 6
    if prev is None or z == prev:
        trend = 0
    elif z > prev:
        trend = trend + 1 if trend > 0 else 2
    else:
        trend = trend - 1 if trend < 0 else -2
    if trend >= 6 or trend <= -6:
        hits.append(("trend", "upper" if trend > 0 else "lower", n))
        trend, prev = 0, None
    else:
        prev = z
    # alternating, 14
    s = 0 if prev2 is None else (z > prev2) - (z < prev2)
    alt = 1 if s == 0 else alt + 1 if s == -step else 2
    if alt >= 14:
        hits.append(("alternating", "both", n))
        alt, step, prev2 = 0, 0, None
    else:
        step, prev2 = s, z
    # two of three in zone A, four of five in zone B
    a_up = ((a_up << 1) | (z > 2.0)) & 7
    a_dn = ((a_dn << 1) | (z < -2.0)) & 7
    if a_up.bit_count() >= 2:
        hits.append(("two-of-three-zone-a", "upper", n))
        a_up = a_dn = 0
    elif a_dn.bit_count() >= 2:
        hits.append(("two-of-three-zone-a", "lower", n))
        a_up = a_dn = 0
    b_up = ((b_up << 1) | (z > 1.0)) & 31
    b_dn = ((b_dn << 1) | (z < -1.0)) & 31
    if b_up.bit_count() >= 4:
        hits.append(("four-of-five-zone-b", "upper", n))
        b_up = b_dn = 0
    elif b_dn.bit_count() >= 4:
        hits.append(("four-of-five-zone-b", "lower", n))
        b_up = b_dn = 0
    # hugging the center, 15; avoiding the center, 8
    hug = hug + 1 if -1.0 < z < 1.0 else 0
    if hug >= 15:
        hits.append(("hugging-center", "both", n))
        hug = 0
    avoid = avoid + 1 if (z > 1.0 or z < -1.0) else 0
    if avoid >= 8:
        hits.append(("avoiding-center", "both", n))
        avoid = 0
    # EWMA with exact start-up limits
    w = _LAM * z + _KEEP * w
    wn += 1
    limit = (
        _EWMA_ASYMPTOTIC
        if wn >= _EWMA_SETTLED
        else _L * math.sqrt(_VAR * (1.0 - _KEEP ** (2 * wn)))
    )
    if w > limit or w < -limit:
        hits.append(("ewma", "upper" if w > 0 else "lower", n))
        w, wn = 0.0, 0
    # tabular CUSUM (the lengths say which readings a signal involves)
    cu = cu + z - _CUSUM_K
    if cu > 0.0:
        cu_n += 1
    else:
        cu, cu_n = 0.0, 0
    cd = cd - z - _CUSUM_K
    if cd > 0.0:
        cd_n += 1
    else:
        cd, cd_n = 0.0, 0
    if cu > _CUSUM_H or cd > _CUSUM_H:
        hits.append(("cusum", "upper" if cu > _CUSUM_H else "lower", n))
        cu = cd = 0.0
        cu_n = cd_n = 0
    # moving range
    if last_x is not None and abs(x - last_x) / sigma > _MR_LIMIT:
        hits.append(("mr-beyond-limit", "upper", n))
    state[:] = (time, x, n + 1, center, sigma, a_up, a_dn, b_up, b_dn, run, trend, prev, alt,
                step, prev2, hug, avoid, w, wn, cu, cd, cu_n, cd_n)  # fmt: skip
    return tuple(hits)
