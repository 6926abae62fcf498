"""Run lengths by simulation through the real detectors, for every selection without an exact
chain.

Why: ``trend`` and ``alternating`` depend on the order of successive values;
``mr-beyond-limit`` without ``beyond-limits`` has an unbounded state; EWMA or CUSUM mixed with
run tests have a state too large to enumerate; so has a zone chain of more than 6,000 states
after merging, which long runs can give. Runs go through fresh detectors from
:func:`limitwatch.stats.rules.build_detectors`, fed one reading at a time exactly as
:class:`limitwatch.engine.StreamMonitor` feeds them, so the simulation also cross-checks the
exact chains against the code the service runs.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Sequence

import numpy as np

from limitwatch.stats.arl.common import ArlError, _label
from limitwatch.stats.rules import RuleSpec, build_detectors

_MAX_RUN = 5_000_000  # a simulated run longer than this is refused (the ARL is out of reach)


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

    >>> from limitwatch.stats.rules import parse_rules
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
