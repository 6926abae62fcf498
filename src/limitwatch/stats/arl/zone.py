"""Exact run lengths of the zone tests: a finite automaton read off the real detectors.

Why: ``beyond-limits``, ``two-of-three-zone-a``, ``four-of-five-zone-b``, ``run-one-side``,
``hugging-center`` and ``avoiding-center`` (any parameters) decide only by which interval of the
z line a reading falls in, so their joint state is finite and the chain has no discretisation
error. The z line is cut at every boundary the tests use; the transitions of each detector are
read off the real detector classes (rebuilt from a state, fed one value from each interval), the
joint states reachable from the zero state are found breadth first, and equivalent states are
merged (Moore's partition refinement). The probabilities are normal CDF differences (Champ &
Woodall 1987).

References
----------
Champ, C. W. & Woodall, W. H. (1987). Exact results for Shewhart control charts with
supplementary runs rules. *Technometrics* 29(4), 393-399.
Moore, E. F. (1956). Gedanken-experiments on sequential machines. *Automata Studies*, 129-153
(merging equivalent states).
"""

from __future__ import annotations

import functools
import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from limitwatch.stats.arl.common import _guard, _mass, _summarise, _TooLarge
from limitwatch.stats.rules import RuleSpec

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

_MAX_RAW_STATES = 300_000  # joint zone states explored before merging


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
