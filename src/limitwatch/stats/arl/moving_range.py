"""Exact run lengths of zone tests together with ``mr-beyond-limit``: collocation over the
previous reading.

Why: the moving range needs the previous reading itself, a continuous state, so the finite zone
automaton (:mod:`limitwatch.stats.arl.zone`) is not enough. The chain then carries (zone state,
previous reading) and solves the integral equation by collocation: Gauss-Legendre nodes on each
piece of ``[-k, k]`` between the zone boundaries and the points where the moving-range condition
``|x - y| <= c`` switches on or off (``p +- c``), with the integral over the next reading cut
exactly at ``y +- c``. Previous readings from which no moving range can exceed the limit
(``|y| < c - k``) carry no node at all. Error well below 1e-6 of the ARL. Needs
``beyond-limits``: without it the previous reading is unbounded.

References
----------
Atkinson, K. E. *The Numerical Solution of Integral Equations of the Second Kind* (Nystrom and
product-integration methods).
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from limitwatch.stats.arl.common import _guard, _mass, _pdf, _summarise
from limitwatch.stats.arl.zone import _zone_automaton
from limitwatch.stats.rules import RuleSpec

_NODES = 3  # Gauss-Legendre nodes per piece of the previous-reading axis (times resolution)
_PIECE = 0.5  # longest piece of the previous-reading axis that one set of nodes covers
_QUAD = 24  # Gauss-Legendre points for each integral over the next reading


@dataclass(frozen=True)
class _Piece:
    lo: float
    hi: float
    zone: int  # interval of the zone automaton this piece lies in
    nodes: np.ndarray | None  # Gauss nodes when the moving range can fire from here, else None


def _lagrange(nodes: np.ndarray, x: np.ndarray) -> np.ndarray:
    """The Lagrange basis polynomials of ``nodes`` at ``x``, shape ``(len(x), len(nodes))``."""
    out = np.ones((x.size, nodes.size))
    for j, xj in enumerate(nodes):
        for m, xm in enumerate(nodes):
            if m != j:
                out[:, j] *= (x - xm) / (xj - xm)
    return out


def _mr_chain(
    specs: tuple[RuleSpec, ...],
    k: float,
    c: float,
    shift: float,
    steady: bool,
    nodes_per_piece: int,
) -> tuple[float, float, int]:
    auto = _zone_automaton(specs)
    inner = [p for p in auto.points if -k <= p <= k]
    cuts = set(inner)
    for p in inner:  # where |x - y| <= c starts or stops cutting a zone interval
        for cut in (p - c, p + c):
            if -k < cut < k:
                cuts.add(cut)
    cuts_sorted = sorted(cuts)
    g_nodes, _ = np.polynomial.legendre.leggauss(nodes_per_piece)
    pieces: list[_Piece] = []
    for left, right in itertools.pairwise(cuts_sorted):
        if right - left < 1e-12:
            continue
        inert = left >= k - c and right <= c - k  # no x in [-k, k] is farther than c from here
        split = 1 if inert else math.ceil((right - left) / _PIECE - 1e-9)
        for i in range(split):
            lo = left + (right - left) * i / split
            hi = right if i == split - 1 else left + (right - left) * (i + 1) / split
            mid = (lo + hi) / 2.0
            zone = int(np.searchsorted(auto.points, mid))
            nodes = None if inert else mid + (hi - lo) / 2.0 * g_nodes
            pieces.append(_Piece(lo, hi, zone, nodes))
    q_nodes, q_weights = np.polynomial.legendre.leggauss(_QUAD)

    def weights(ys: np.ndarray | None, target: _Piece, d: float) -> np.ndarray:
        """Rows: previous readings ``ys`` (None: no previous reading / any); columns: the
        target's nodes (one column when it has none): integral of the normal density times
        the Lagrange basis over the part of the target within ``c`` of the previous reading."""
        rows = [None] if ys is None else list(ys)
        cols = 1 if target.nodes is None else target.nodes.size
        out = np.zeros((len(rows), cols))
        for r, y in enumerate(rows):
            lo, hi = target.lo, target.hi
            if y is not None:
                lo, hi = max(lo, y - c), min(hi, y + c)
            if hi <= lo:
                continue
            if target.nodes is None and y is None:
                out[r, 0] = float(_mass(np.array(lo - d), np.array(hi - d)))
                continue
            x = (hi + lo) / 2.0 + (hi - lo) / 2.0 * q_nodes
            w = (hi - lo) / 2.0 * q_weights * _pdf(x - d)
            basis = np.ones((x.size, 1)) if target.nodes is None else _lagrange(target.nodes, x)
            out[r] = w @ basis
        return out

    # Keys: (zone state, piece index or -1 when the previous reading does not matter).
    start_key = (0, -1)
    keys = {start_key: 0}
    order = [start_key]
    pos = 0
    edges: list[tuple[int, int, int]] = []  # (source key, target piece, target key)
    while pos < len(order):
        state, piece = order[pos]
        src_nodes = None if piece < 0 else pieces[piece].nodes
        for t, target in enumerate(pieces):
            nxt = int(auto.table[state, target.zone])
            if nxt < 0:
                continue
            if src_nodes is not None:
                y_lo, y_hi = pieces[piece].lo, pieces[piece].hi
                if target.lo >= y_hi + c or target.hi <= y_lo - c:
                    continue
            tkey = (nxt, t if target.nodes is not None else -1)
            if tkey not in keys:
                keys[tkey] = len(order)
                order.append(tkey)
            edges.append((pos, t, keys[tkey]))
        pos += 1
    sizes = [1 if p < 0 else pieces[p].nodes.size for _, p in order]  # type: ignore[union-attr]
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    n = int(offsets[-1])
    _guard(n)

    def matrix(d: float) -> np.ndarray:
        cache: dict[tuple[int, int], np.ndarray] = {}
        q = np.zeros((n, n))
        for src, t, dst in edges:
            piece = order[src][1]
            block = cache.get((piece, t))
            if block is None:
                ys = None if piece < 0 else pieces[piece].nodes
                block = cache[(piece, t)] = weights(ys, pieces[t], d)
            q[offsets[src] : offsets[src + 1], offsets[dst] : offsets[dst + 1]] += block
        return q

    q = matrix(shift)
    q0 = matrix(0.0) if steady else q
    arl, sd = _summarise(q0, q, 0, steady)
    return arl, sd, n
