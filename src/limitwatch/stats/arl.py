"""Average run length (ARL) of any selection of run tests, EWMA and CUSUM, before it goes live.

Why: every run test added to a chart makes it quicker to see a real shift and quicker to raise a
false alarm. The run length -- readings from the start until the first signal -- measures both:
its mean with the process in control (ARL0) sets the false-alarm rate, its mean after a shift of
the mean by ``d`` sigma sets the detection delay. :func:`run_length` gives the mean and the
standard deviation for a rule selection as :func:`limitwatch.stats.rules.parse_rules` reads it.

Model
    Readings are independent and normal with known parameters: in standardized units the
    detectors see ``z ~ N(d, 1)`` (``d = 0`` in control) and the moving range ``|z_t - z_(t-1)|``.
    Real data that are autocorrelated, skewed, or judged against estimated limits give other
    run lengths (for positively autocorrelated readings, more false alarms: see the lag-1
    autocorrelation warning of :func:`limitwatch.stats.baseline.fit_baseline`).
Start-up convention (zero state)
    Every detector starts empty, exactly as a fresh detector does (windows and runs empty, EWMA at
    0, CUSUM sums at their head start), and the first reading has no moving range (the range
    window starts empty too, as for a monitor started on a stored baseline). A monitor that has
    just learned its baseline from the same stream already holds the previous reading, so its
    first moving range can signal at once: with ``mr-beyond-limit`` that shortens the in-control
    ARL by about 0.8% (``P(first range beyond its limit) = 0.0082`` times the ARL). A shift is
    present from the first reading on. This is the zero-state ARL of Champ & Woodall (1987)
    and of the published tables. ``start="steady"`` gives instead the steady-state ARL: the
    shift arrives after the chart has run in control long enough, without a signal, for its
    state to settle (the quasi-stationary distribution of the in-control chain; for the EWMA
    with exact start-up limits the limits are then asymptotic). For the two-of-three and
    four-of-five tests the two differ after a shift from the second decimal on (by 0.02 to
    0.5 readings for shifts of 1 to 3 sigma), the zero-state ARL being the longer: a fresh
    window holds no reading that counts towards the pattern, a settled one often already
    holds one. The planner and the published tables use the zero state.
One run, first signal
    A run ends at the first signal of any selected detector, so the restart conventions after a
    signal do not enter the ARL. Rates of false alarms over long periods (see
    :mod:`limitwatch.planner`) treat every signal as a renewal (all detectors fresh); in the
    service only the signalling detector restarts, which makes the renewal figure an
    approximation.

Methods
    ``exact`` -- a Markov chain over the detectors' joint state (Brook & Evans 1972), solved as
    ``ARL = first entry of (I - Q)^-1 1`` and ``E[N^2]`` from ``(I - Q)^-1 (2 ARL - 1)``:

    * Zone tests (``beyond-limits``, ``two-of-three-zone-a``, ``four-of-five-zone-b``,
      ``run-one-side``, ``hugging-center``, ``avoiding-center``, any parameters): the z line is
      cut at every boundary the tests use; the transitions of each detector are read off the
      real detector classes (rebuilt from a state, fed one value from each interval), the
      joint states reachable from the zero state are found breadth first, and equivalent states
      are merged (Moore's partition refinement). No discretisation error: the probabilities are
      normal CDF differences (Champ & Woodall 1987).
    * ``mr-beyond-limit`` together with ``beyond-limits``: the moving range needs the previous
      reading itself, a continuous state. The chain then carries (zone state, previous reading)
      and solves the integral equation by collocation: Gauss-Legendre nodes on each piece of
      ``[-k, k]`` between the zone boundaries and the points where the moving-range condition
      ``|x - y| <= c`` switches on or off (``p +- c``), with the integral over the next reading
      cut exactly at ``y +- c``. Previous readings from which no moving range can exceed the
      limit (``|y| < c - k``) carry no node at all. Error well below 1e-6 of the ARL.
    * ``ewma`` (optionally with ``beyond-limits``): Brook & Evans cells over the asymptotic band,
      with the detector's own start-up limits stepped through exactly (they are time-varying
      until they settle) and Richardson extrapolation over two cell counts.
    * ``cusum`` (optionally with ``beyond-limits``): Brook & Evans cells over both sums
      ``(C+, C-)`` (two-sided, with the head start), Richardson extrapolation over two grids.

    ``simulated`` -- every other selection (``trend`` and ``alternating`` depend on the order
    of successive values; ``mr-beyond-limit`` without ``beyond-limits`` has an unbounded state;
    EWMA or CUSUM mixed with run tests have a state too large to enumerate; so has a zone
    chain of more than 6,000 states after merging, which long runs can give). Runs go through
    fresh detectors from :func:`limitwatch.stats.rules.build_detectors`, fed one reading at a time
    exactly as :class:`limitwatch.engine.StreamMonitor` feeds them; the result carries the
    standard error of the mean and the number of runs. Runs continue until the standard error
    is below ``rel_error`` of the mean (1% by default) or a cap on runs or readings is reached.

Results are cached per (rules, shift, start, resolution, simulation settings) for the life of the
process; :func:`cache_export` and :func:`cache_import` let a caller keep them in a file (this
module does no I/O itself).

>>> round(run_length("beyond-limits").arl, 2)
370.4
>>> r = run_length("beyond-limits, two-of-three-zone-a")
>>> r.method, round(r.arl, 2)
('exact', 225.44)

References
----------
Brook, D. & Evans, D. A. (1972). An approach to the probability distribution of CUSUM run
length. *Biometrika* 59(3), 539-549.
Champ, C. W. & Woodall, W. H. (1987). Exact results for Shewhart control charts with
supplementary runs rules. *Technometrics* 29(4), 393-399.
Lucas, J. M. & Saccucci, M. S. (1990). Exponentially weighted moving average control schemes:
properties and enhancements. *Technometrics* 32(1), 1-12.
Lucas, J. M. & Crosier, R. B. (1982). Fast initial response for CUSUM quality-control schemes.
*Technometrics* 24(3), 199-205.
Moore, E. F. (1956). Gedanken-experiments on sequential machines. *Automata Studies*, 129-153
(merging equivalent states).
Atkinson, K. E. *The Numerical Solution of Integral Equations of the Second Kind* (Nystrom and
product-integration methods).
Montgomery, D. C. *Introduction to Statistical Quality Control*, chapters on CUSUM and EWMA
charts and on average run length.
"""

from __future__ import annotations

import functools
import itertools
import math
import zlib
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from limitwatch.stats.rules import RuleSpec, build_detectors, parse_rules

__all__ = [
    "ALGORITHM_VERSION",
    "ZONE_RULES",
    "ArlError",
    "RunLength",
    "cache_clear",
    "cache_export",
    "cache_import",
    "exact_kind",
    "run_length",
    "simulate_run_lengths",
    "simulation_reason",
]

ALGORITHM_VERSION = 1
"""Part of every cache key: raise it when a change to the methods changes any result."""

Start = Literal["zero", "steady"]
Method = Literal["auto", "exact", "simulate"]

ZONE_RULES = frozenset(
    {
        "beyond-limits",
        "two-of-three-zone-a",
        "four-of-five-zone-b",
        "run-one-side",
        "hugging-center",
        "avoiding-center",
    }
)
"""Tests whose decision depends only on which interval of the z line a reading falls in."""

_NODES = 3  # Gauss-Legendre nodes per piece of the previous-reading axis (times resolution)
_PIECE = 0.5  # longest piece of the previous-reading axis that one set of nodes covers
_QUAD = 24  # Gauss-Legendre points for each integral over the next reading
_EWMA_CELLS = 50  # Brook & Evans cells (2 n + 1 and 4 n + 1 of them, times resolution)
_CUSUM_CELLS = 30  # cells per sum (n and 2 n of them, times resolution)
_SETTLED = 1e-13  # EWMA start-up limits count as asymptotic once (1 - lam)^(2n) is below this
_MAX_RUN = 5_000_000  # a simulated run longer than this is refused (the ARL is out of reach)
_MAX_STATES = 6_000  # larger exact chains are simulated instead (a dense solve grows as n^3)
_MAX_RAW_STATES = 300_000  # joint zone states explored before merging


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


# -- zone tests: a finite automaton read off the real detectors --------------------------------


def _zone_points(spec: RuleSpec) -> tuple[float, ...]:
    det: Any = spec.build()
    if spec.rule == "beyond-limits":
        return (det.k,)
    if spec.rule == "run-one-side":
        return ()
    return (det.boundary,)


class _DetectorTable:
    """Transitions of one zone detector over the intervals, by driving the real class."""

    def __init__(self, spec: RuleSpec, probes: Sequence[float]) -> None:
        fresh = spec.build()
        snap = fresh.state()
        keys = [k for k in snap["state"] if k != "last"]
        has_last = "last" in snap["state"]
        cls = type(fresh)
        zero = tuple(snap["state"][k] for k in keys)
        index = {zero: 0}
        order = [zero]
        rows: list[list[int]] = []
        pos = 0
        while pos < len(order):
            state = dict(zip(keys, order[pos], strict=True))
            if has_last:
                state["last"] = None
            row = []
            for probe in probes:
                det = cls.from_state(
                    {"rule": snap["rule"], "params": snap["params"], "state": state}
                )
                if det.update(0, probe) is not None:
                    row.append(-1)
                    continue
                after = det.state()["state"]
                key = tuple(after[k] for k in keys)
                if key not in index:
                    index[key] = len(order)
                    order.append(key)
                row.append(index[key])
            rows.append(row)
            pos += 1
        self.table = rows


def _minimise(table: np.ndarray) -> np.ndarray:
    """Moore's partition refinement: a label per state, equal labels behaving identically for
    every future sequence of intervals (``-1`` in ``table`` is the signal)."""
    labels = np.zeros(table.shape[0], dtype=np.int64)
    count = 1
    while True:
        successors = np.where(table >= 0, labels[np.maximum(table, 0)], -1)
        _, fresh = np.unique(np.column_stack([labels, successors]), axis=0, return_inverse=True)
        fresh = np.asarray(fresh).ravel()
        new_count = int(fresh.max()) + 1
        if new_count == count:
            return fresh
        labels, count = fresh, new_count


@dataclass(frozen=True)
class _ZoneAutomaton:
    points: tuple[float, ...]  # interval boundaries, ascending; intervals include both tails
    table: np.ndarray  # (states, intervals) -> next state or -1 (signal); state 0 is the start

    @property
    def intervals(self) -> int:
        return len(self.points) + 1

    def bounds(self, i: int) -> tuple[float, float]:
        lo = -math.inf if i == 0 else self.points[i - 1]
        hi = math.inf if i == len(self.points) else self.points[i]
        return lo, hi


@functools.lru_cache(maxsize=64)
def _zone_automaton(specs: tuple[RuleSpec, ...]) -> _ZoneAutomaton:
    points = sorted({0.0} | {s * p for spec in specs for p in _zone_points(spec) for s in (-1, 1)})
    probes = [points[0] - 1.0]
    probes += [(a + b) / 2.0 for a, b in itertools.pairwise(points)]
    probes.append(points[-1] + 1.0)
    tables = [np.array(_DetectorTable(spec, probes).table) for spec in specs]
    zero = (0,) * len(specs)
    index = {zero: 0}
    order = [zero]
    joint: list[list[int]] = []
    pos = 0
    while pos < len(order):
        state = order[pos]
        row = []
        for z in range(len(probes)):
            nxt = tuple(int(t[s, z]) for t, s in zip(tables, state, strict=True))
            if -1 in nxt:
                row.append(-1)
                continue
            if nxt not in index:
                index[nxt] = len(order)
                order.append(nxt)
            row.append(index[nxt])
        joint.append(row)
        pos += 1
        if len(order) > _MAX_RAW_STATES:
            raise _TooLarge(f"more than {_MAX_RAW_STATES} joint states before merging")
    full = np.array(joint, dtype=np.int64)
    labels = _minimise(full)
    # Renumber so that the start state is 0, then one row per merged state.
    relabel = np.full(int(labels.max()) + 1, -1, dtype=np.int64)
    relabel[labels[0]] = 0
    nxt_label = 1
    for lab in labels:
        if relabel[lab] < 0:
            relabel[lab] = nxt_label
            nxt_label += 1
    merged = np.full((nxt_label, full.shape[1]), -1, dtype=np.int64)
    for raw, lab in enumerate(labels):
        row = full[raw]
        merged[relabel[lab]] = np.where(row >= 0, relabel[labels[np.maximum(row, 0)]], -1)
    return _ZoneAutomaton(tuple(points), merged)


def _zone_chain(
    specs: tuple[RuleSpec, ...], shift: float, steady: bool
) -> tuple[float, float, int]:
    """Zone tests without the moving range: a finite chain with exact probabilities."""
    auto = _zone_automaton(specs)
    probs = np.array(
        [_mass(*(np.array(b) - shift)) for b in map(auto.bounds, range(auto.intervals))]
    )
    probs0 = np.array([_mass(*np.array(b)) for b in map(auto.bounds, range(auto.intervals))])

    _guard(auto.table.shape[0])

    def matrix(p: np.ndarray) -> np.ndarray:
        n = auto.table.shape[0]
        q = np.zeros((n, n))
        rows, cols = np.nonzero(auto.table >= 0)
        np.add.at(q, (rows, auto.table[rows, cols]), p[cols])
        return q

    q = matrix(probs)
    arl, sd = _summarise(matrix(probs0) if steady else q, q, 0, steady)
    return arl, sd, q.shape[0]


# -- zone tests with the moving range: collocation over the previous reading -----------------------


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


# -- simulation through the real detectors ------------------------------------------------------


def _normals(rng: np.random.Generator, shift: float, chunk: int = 4096) -> Iterator[float]:
    while True:
        yield from (rng.standard_normal(chunk) + shift).tolist()


def simulate_run_lengths(
    specs: Sequence[RuleSpec],
    shift: float,
    *,
    seed: int,
    rel_error: float = 0.01,
    min_runs: int = 400,
    max_runs: int = 40_000,
    max_readings: int = 3_000_000,
    readings: Iterable[float] | None = None,
) -> np.ndarray:
    """Run lengths of fresh detectors fed ``N(shift, 1)`` readings (and the moving ranges of
    successive readings, the first reading having none), until the standard error of the mean
    is below ``rel_error`` of the mean, or ``max_runs`` runs or ``max_readings`` readings.

    ``readings`` replaces the random ones (standardized values, used as given); the runs stop
    when they run out, and an unfinished last run is dropped.

    >>> simulate_run_lengths(parse_rules("beyond-limits"), 0.0, seed=1, readings=[0, 3.5, 1, -4])
    array([2., 2.])
    """
    values = _normals(np.random.default_rng(seed), shift) if readings is None else iter(readings)
    lengths: list[int] = []
    total = 0
    while True:
        detectors = build_detectors(specs)
        x_updates = [d.update for d in detectors if d.chart == "x"]
        mr_updates = [d.update for d in detectors if d.chart == "mr"]
        i = 0
        prev: float | None = None
        signalled = False
        for z in values:
            for update in x_updates:
                if update(i, z) is not None:
                    signalled = True
                    break
            if prev is not None and not signalled:
                mr = abs(z - prev)  # the engine's moving range, in sigma units
                for update in mr_updates:
                    if update(i, mr) is not None:
                        signalled = True
                        break
            if signalled:
                break
            prev = z
            i += 1
            if i >= _MAX_RUN:
                raise ArlError(
                    f"no signal in {_MAX_RUN} simulated readings: the run length of "
                    f"{_label(specs)} at a shift of {shift} sigma is too long to simulate"
                )
        if not signalled:  # the given readings ran out
            break
        lengths.append(i + 1)
        total += i + 1
        runs = len(lengths)
        if runs >= max_runs or total >= max_readings:
            break
        if runs >= min_runs and runs % 100 == 0:
            arr = np.asarray(lengths, dtype=float)
            if arr.std(ddof=1) / math.sqrt(runs) <= rel_error * arr.mean():
                break
    return np.asarray(lengths, dtype=float)


# -- choosing a method -----------------------------------------------------------------------------


def _label(specs: Iterable[RuleSpec]) -> str:
    return ", ".join(str(s) for s in specs)


def simulation_reason(specs: Iterable[RuleSpec]) -> str | None:
    """Why a selection has no exact chain (None when it has one)."""
    rules = {s.rule for s in specs}
    if not rules:
        return "no rules selected"
    if rules & {"trend", "alternating"}:
        return "trend and alternating depend on the order of successive values"
    unknown = rules - ZONE_RULES - {"mr-beyond-limit", "ewma", "cusum"}
    if unknown:
        return f"no Markov chain is built here for {', '.join(sorted(unknown))}"
    smoothers = rules & {"ewma", "cusum"}
    if len(smoothers) > 1:
        return "EWMA and CUSUM together have a two-dimensional continuous state"
    if smoothers:
        if rules - smoothers - {"beyond-limits"}:
            return "an EWMA or CUSUM mixed with run tests has a state too large to enumerate"
        return None
    if "mr-beyond-limit" in rules and "beyond-limits" not in rules:
        return "the moving-range rule without beyond-limits has an unbounded state"
    return None


def exact_kind(specs: Iterable[RuleSpec]) -> str | None:
    """``zone``, ``zone+mr``, ``ewma`` or ``cusum`` when an exact chain exists, else None."""
    specs = list(specs)
    if simulation_reason(specs) is not None:
        return None
    rules = {s.rule for s in specs}
    if "ewma" in rules:
        return "ewma"
    if "cusum" in rules:
        return "cusum"
    return "zone+mr" if "mr-beyond-limit" in rules else "zone"


def _exact(specs: tuple[RuleSpec, ...], shift: float, steady: bool, resolution: int) -> RunLength:
    kind = exact_kind(specs)
    by_rule = {s.rule: s.build() for s in specs}
    limits: Any = by_rule.get("beyond-limits")
    k = None if limits is None else float(limits.k)
    if kind == "zone":
        arl, sd, n = _zone_chain(specs, shift, steady)
    elif kind == "zone+mr":
        zone = tuple(s for s in specs if s.rule != "mr-beyond-limit")
        c = float(by_rule["mr-beyond-limit"].limit)  # type: ignore[attr-defined]
        assert k is not None
        arl, sd, n = _mr_chain(zone, k, c, shift, steady, _NODES * resolution)
    elif kind == "ewma":
        det: Any = by_rule["ewma"]
        runs = [
            _ewma_chain(det.lam, det.L, det.exact_startup, k, shift, steady, m * resolution)
            for m in (_EWMA_CELLS, 2 * _EWMA_CELLS)
        ]
        h1, h2 = 1.0 / runs[0][2], 1.0 / runs[1][2]
        arl = _richardson(runs[0][0], runs[1][0], h1, h2)
        sd = _richardson(runs[0][1], runs[1][1], h1, h2)
        n = runs[1][2]
    elif kind == "cusum":
        det = by_rule["cusum"]
        runs = [
            _cusum_chain(det.k, det.h, det.headstart, k, shift, steady, m * resolution)
            for m in (_CUSUM_CELLS, 2 * _CUSUM_CELLS)
        ]
        h1 = 1.0 / (2 * _CUSUM_CELLS * resolution - 1)
        h2 = 1.0 / (4 * _CUSUM_CELLS * resolution - 1)
        arl = _richardson(runs[0][0], runs[1][0], h1, h2)
        sd = _richardson(runs[0][1], runs[1][1], h1, h2)
        n = runs[1][2]
    else:
        raise ArlError(f"{_label(specs)}: no exact method ({simulation_reason(specs)})")
    return RunLength(arl=arl, sd=sd, method="exact", states=n)


# -- the public entry point and its cache --------------------------------------------------------


@dataclass(frozen=True)
class _Key:
    specs: tuple[RuleSpec, ...]
    shift: float
    start: Start
    method: Method
    resolution: int
    rel_error: float
    max_runs: int
    seed: int | None

    @property
    def text(self) -> str:
        """The question in full, every detector parameter spelt out (defaults included), so a
        saved answer is never reused after a default changes."""
        rules = ", ".join(_spelt_out(s) for s in self.specs)
        return (
            f"v{ALGORITHM_VERSION}|{rules}|shift={self.shift!r}|{self.start}|"
            f"{self.method}|res={self.resolution}|sim={self.rel_error!r},{self.max_runs},"
            f"{self.seed}"
        )


def _spelt_out(spec: RuleSpec) -> str:
    params = spec.build().state()["params"]
    return f"{spec.rule}({', '.join(f'{k}={params[k]!r}' for k in sorted(params))})"


_IMPORTED: dict[str, RunLength] = {}
_COMPUTED: dict[str, RunLength] = {}


@functools.lru_cache(maxsize=4096)
def _cached(key: _Key) -> RunLength:
    text = key.text
    known = _IMPORTED.get(text)
    if known is not None:
        return known
    method = key.method
    reason = simulation_reason(key.specs)
    if method == "exact" and reason is not None:
        raise ArlError(f"{_label(key.specs)} has no exact chain: {reason}; simulate instead")
    result = None
    if method != "simulate" and reason is None:
        try:
            result = _exact(key.specs, key.shift, key.start == "steady", key.resolution)
        except _TooLarge as exc:
            if method == "exact":
                raise ArlError(f"{_label(key.specs)}: {exc}; simulate instead") from None
            reason = str(exc)
    if result is None:
        if key.start != "zero":
            raise ArlError(
                f"{_label(key.specs)}: a steady-state start is computed by the exact chains "
                "only; this selection is simulated from the zero state"
            )
        seed = key.seed if key.seed is not None else zlib.crc32(text.encode())
        lengths = simulate_run_lengths(
            key.specs, key.shift, seed=seed, rel_error=key.rel_error, max_runs=key.max_runs
        )
        sd = float(lengths.std(ddof=1))
        result = RunLength(
            arl=float(lengths.mean()),
            sd=sd,
            method="simulated",
            standard_error=sd / math.sqrt(lengths.size),
            runs=int(lengths.size),
        )
    _COMPUTED[text] = result
    return result


def _specs(rules: str | Iterable[RuleSpec]) -> tuple[RuleSpec, ...]:
    specs = parse_rules(rules) if isinstance(rules, str) else list(rules)
    if not specs:
        raise ArlError("no rules selected")
    # The run length does not depend on the order of the rules; one order makes one cache key.
    return tuple(sorted(dict.fromkeys(specs), key=str))


def run_length(
    rules: str | Iterable[RuleSpec],
    shift: float = 0.0,
    *,
    start: Start = "zero",
    method: Method = "auto",
    resolution: int = 1,
    rel_error: float = 0.01,
    max_runs: int = 40_000,
    seed: int | None = None,
) -> RunLength:
    """Mean and standard deviation of the run length of ``rules`` when the mean has shifted by
    ``shift`` sigma (0: in control).

    ``method="auto"`` solves a Markov chain when the selection has one and simulates otherwise;
    ``"exact"`` refuses to simulate and ``"simulate"`` refuses the chain (for cross-checks).
    ``resolution`` multiplies the nodes or cells of the exact methods (accuracy checks);
    ``rel_error``, ``max_runs`` and ``seed`` steer a simulation (the default seed is derived
    from the question, so the same question always gets the same answer).

    >>> r = run_length("cusum(h=4)", 1.0)
    >>> r.method, round(r.arl, 2)
    ('exact', 8.38)
    """
    if start not in ("zero", "steady"):
        raise ArlError(f"start must be 'zero' or 'steady', got {start!r}")
    if method not in ("auto", "exact", "simulate"):
        raise ArlError(f"method must be 'auto', 'exact' or 'simulate', got {method!r}")
    shift = float(shift)
    if not math.isfinite(shift):
        raise ArlError(f"the shift must be a finite number of sigma, got {shift!r}")
    if not (isinstance(resolution, int) and resolution >= 1):
        raise ArlError(f"resolution must be a whole number >= 1, got {resolution!r}")
    if not 0.0 < rel_error < 1.0:
        raise ArlError(f"rel_error must be between 0 and 1, got {rel_error!r}")
    key = _Key(_specs(rules), shift, start, method, resolution, float(rel_error), max_runs, seed)
    return _cached(key)


def cache_export() -> dict[str, dict[str, Any]]:
    """Every result known to this process (imported or computed), as JSON-ready data keyed by
    a text that names the question and :data:`ALGORITHM_VERSION`."""
    return {text: r.to_dict() for text, r in {**_IMPORTED, **_COMPUTED}.items()}


def cache_import(data: Mapping[str, Any]) -> int:
    """Take results saved by :func:`cache_export`; entries from another algorithm version or
    that do not read back are skipped. Returns how many were taken."""
    taken = 0
    prefix = f"v{ALGORITHM_VERSION}|"
    for text, entry in data.items():
        if not (isinstance(text, str) and text.startswith(prefix) and isinstance(entry, Mapping)):
            continue
        try:
            _IMPORTED[text] = RunLength.from_dict(entry)
        except (KeyError, TypeError, ValueError):
            continue
        taken += 1
    return taken


def cache_clear() -> None:
    """Forget every result (computed and imported)."""
    _cached.cache_clear()
    _IMPORTED.clear()
    _COMPUTED.clear()
