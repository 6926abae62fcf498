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
    ``ARL = first entry of (I - Q)^-1 1`` and ``E[N^2]`` from ``(I - Q)^-1 (2 ARL - 1)``
    (:mod:`~limitwatch.stats.arl.common`):

    * zone tests (``beyond-limits``, ``two-of-three-zone-a``, ``four-of-five-zone-b``,
      ``run-one-side``, ``hugging-center``, ``avoiding-center``, any parameters): a finite
      automaton read off the real detectors, no discretisation error
      (:mod:`~limitwatch.stats.arl.zone`);
    * ``mr-beyond-limit`` together with ``beyond-limits``: collocation over the previous
      reading (:mod:`~limitwatch.stats.arl.moving_range`);
    * ``ewma`` or ``cusum`` (optionally with ``beyond-limits``): Brook & Evans cells with
      Richardson extrapolation (:mod:`~limitwatch.stats.arl.smoothed`).

    ``simulated`` -- every other selection, through fresh real detectors
    (:mod:`~limitwatch.stats.arl.simulation`); the result carries the standard error of the
    mean and the number of runs. Runs continue until the standard error is below
    ``rel_error`` of the mean (1% by default) or a cap on runs or readings is reached.

Results are cached per (rules, shift, start, resolution, simulation settings) for the life of the
process; :func:`cache_export` and :func:`cache_import` let a caller keep them in a file (this
module does no I/O itself).

>>> round(run_length("beyond-limits").arl, 2)
370.4
>>> r = run_length("beyond-limits, two-of-three-zone-a")
>>> r.method, round(r.arl, 2)
('exact', 225.44)

Each module names the published sources of its method beside its code; the start-up
convention follows Champ & Woodall (1987).

References
----------
Brook, D. & Evans, D. A. (1972). An approach to the probability distribution of CUSUM run
length. *Biometrika* 59(3), 539-549.
Champ, C. W. & Woodall, W. H. (1987). Exact results for Shewhart control charts with
supplementary runs rules. *Technometrics* 29(4), 393-399.
"""

from limitwatch.stats.arl.api import (
    ALGORITHM_VERSION,
    Method,
    Start,
    cache_clear,
    cache_export,
    cache_import,
    exact_kind,
    run_length,
    simulation_reason,
)
from limitwatch.stats.arl.common import ArlError, RunLength
from limitwatch.stats.arl.simulation import simulate_run_lengths
from limitwatch.stats.arl.zone import ZONE_RULES

__all__ = [
    "ALGORITHM_VERSION",
    "ZONE_RULES",
    "ArlError",
    "Method",
    "RunLength",
    "Start",
    "cache_clear",
    "cache_export",
    "cache_import",
    "exact_kind",
    "run_length",
    "simulate_run_lengths",
    "simulation_reason",
]
