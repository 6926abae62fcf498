"""EWMA and tabular CUSUM: checks against reference computations and a handbook worked example.

The generic incremental-vs-batch, state round trip and pickling properties for these two
detectors run with every other detector in tests/test_rules.py; here are the checks specific to
them.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st

from limitwatch.stats.rules import BeyondLimits
from limitwatch.stats.smoothing import Cusum, Ewma
from tests.helpers import examples


def feed(det, values, first_index=0):
    return [s for i, z in enumerate(values, first_index) if (s := det.update(i, z)) is not None]


# ------------------------------------------------------------------------------------------
# EWMA
# ------------------------------------------------------------------------------------------


@settings(derandomize=True, max_examples=examples(50), deadline=None)
@given(
    values=st.lists(st.floats(-0.5, 0.5, allow_nan=False), min_size=1, max_size=200),
    lam=st.sampled_from([0.05, 0.1, 0.2, 0.4, 0.75, 1.0]),
)
def test_ewma_statistic_matches_a_linear_filter(values, lam):
    # Roberts (1959): w_i = lam z_i + (1 - lam) w_(i-1), w_0 = 0, i.e. a first-order IIR filter;
    # scipy.signal.lfilter is the reference implementation of such a filter.
    # Limits out of reach, so no restarts: with q = 1 - lam, |w_n| <= 0.5 (1 - q^n), while the
    # limit 10 sqrt(lam / (2 - lam)) sqrt(1 - q^(2n)) >= 1.6 (1 - q^n) for every lam here.
    det = Ewma(lam=lam, L=10.0)
    got = []
    for i, z in enumerate(values):
        assert det.update(i, z) is None
        got.append(det.state()["state"]["w"])
    want = scipy.signal.lfilter([lam], [1.0, -(1.0 - lam)], values)
    np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("lam", [0.05, 0.1, 0.2, 0.5, 1.0])
def test_exact_startup_limit_is_L_times_the_standard_deviation_of_w(lam):
    # Var(w_n) = lam^2 * sum_{j<n} (1 - lam)^(2j) for unit-variance readings (Lucas & Saccucci
    # 1990, eq. for the exact variance); summed term by term here, not by the closed form.
    det = Ewma(lam=lam, L=2.5)
    for n in [1, 2, 3, 10, 50, 400]:
        var = sum(lam**2 * (1 - lam) ** (2 * j) for j in range(n))
        assert det.limit(n) == pytest.approx(2.5 * math.sqrt(var), rel=1e-12)
    asymptotic = Ewma(lam=lam, L=2.5, exact_startup=False)
    assert asymptotic.limit(1) == pytest.approx(2.5 * math.sqrt(lam / (2 - lam)), rel=1e-12)
    assert all(det.limit(n) <= det.limit(n + 1) <= asymptotic.limit(n) for n in range(1, 200))


def test_ewma_with_lambda_one_is_the_shewhart_chart():
    # lam = 1 makes w the reading itself and the limit L sigma at every n.
    rng = np.random.default_rng(7)
    values = rng.normal(0, 1.4, 3000).tolist()
    shewhart = [(s.index, s.side) for s in feed(BeyondLimits(k=3.0), values)]
    ewma = [(s.index, s.side) for s in feed(Ewma(lam=1.0, L=3.0), values)]
    assert shewhart == ewma and len(ewma) > 10


def test_ewma_restarts_from_zero_after_a_signal():
    det = Ewma(lam=0.5, L=1.0)
    s = det.update(0, 3.0)  # w = 1.5 > 1.0 * sqrt(1/3 * 0.75) = 0.5
    assert (s.side, s.statistic, s.involved) == ("upper", 1.5, (0,))
    assert s.limit == pytest.approx(0.5)
    assert det.state()["state"] == {"w": 0.0, "n": 0, "last": 0}
    assert det.update(1, 0.4) is None  # w = 0.2, limit back at the first-reading value 0.5
    assert det.state()["state"]["w"] == 0.2


def test_ewma_lower_side_reports_the_negative_limit():
    s = feed(Ewma(lam=0.2, L=2.0), [-1.0] * 20)[0]
    assert s.side == "lower" and s.statistic < s.limit < 0


def test_ewma_involved_holds_the_readings_that_carry_99_percent_of_the_weight():
    det = Ewma(lam=0.2)
    feed(det, [0.0] * 1000)
    s = feed(det, [4.0] * 10, first_index=1000)[0]
    # 1 - 0.8^21 = 0.9908 >= 0.99 > 1 - 0.8^20 = 0.9885
    assert s.involved == tuple(range(s.index - 20, s.index + 1))
    s = feed(Ewma(lam=0.2), [4.0] * 10)[0]
    assert s.involved == tuple(range(s.index + 1))  # fewer since the start: all of them


@pytest.mark.parametrize(
    "params", [{"lam": 0.0}, {"lam": 1.5}, {"lam": math.nan}, {"L": 0.0}, {"exact_startup": 1}]
)
def test_ewma_refuses_bad_parameters(params):
    with pytest.raises(ValueError):
        Ewma(**params)


# ------------------------------------------------------------------------------------------
# CUSUM
# ------------------------------------------------------------------------------------------

# Montgomery, Introduction to Statistical Quality Control, tabular CUSUM worked example (from
# memory): target 10, sigma 1, k = 0.5, h = 5; the first 20 readings in control, the last 10
# after a one-sigma upward shift. The chart signals at period 29 with C+ = 5.28 and N+ = 7,
# i.e. the shift is dated to just after period 22.
MONTGOMERY_CUSUM_DATA = [
    9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34,
    9.03, 11.47, 10.51, 9.40, 10.08, 9.37, 10.62, 10.31, 8.52, 10.84,
    10.90, 9.33, 12.29, 11.50, 10.60, 11.08, 10.38, 11.62, 11.31, 10.52,
]  # fmt: skip


def test_cusum_reproduces_the_handbook_worked_example():
    det = Cusum(k=0.5, h=5.0)
    upper, lower = [], []
    found = []
    for i, x in enumerate(MONTGOMERY_CUSUM_DATA):
        s = det.update(i, x - 10.0)
        if s is not None:
            found.append(s)
            break
        state = det.state()["state"]
        upper.append(round(state["up"], 2))
        lower.append(round(state["down"], 2))
    # Periods 1-5 of the example's table (from memory): C+ 0, 0, 0, 1.16, 2.82; C- 0.05, 1.56,
    # 1.77, 0, 0.
    assert upper[:5] == [0.0, 0.0, 0.0, 1.16, 2.82]
    assert lower[:5] == [0.05, 1.56, 1.77, 0.0, 0.0]
    (s,) = found
    assert s.index + 1 == 29 and s.side == "upper"
    assert s.statistic == pytest.approx(5.28, abs=0.005)
    assert len(s.involved) == 7 and s.involved[0] + 1 == 23


def test_cusum_lower_side_reports_the_positive_sum_and_h():
    s = feed(Cusum(), [-1.0] * 20)[0]
    # C- grows by |z| - k = 0.5 per reading: 5.5 > 5 at the 11th reading.
    assert (s.index, s.side, s.statistic, s.limit) == (10, "lower", 5.5, 5.0)
    assert s.involved == tuple(range(11))


def test_cusum_restarts_both_sums_at_the_head_start():
    det = Cusum(k=0.5, h=4.0, headstart=2.0)
    fresh = det.state()
    assert fresh["state"]["up"] == fresh["state"]["down"] == 2.0
    s = feed(det, [1.5, 1.5])  # C+ = 2 + 1 + 1 = 4, not above h
    assert s == [] and det.state()["state"]["up"] == 4.0
    s = det.update(2, 0.6)
    assert s.statistic == pytest.approx(4.1) and s.involved == (0, 1, 2)
    state = det.state()["state"]
    assert (state["up"], state["down"], state["up_len"], state["down_len"]) == (2.0, 2.0, 0, 0)


def test_head_start_signals_a_shift_present_from_the_start_sooner():
    # Lucas & Crosier (1982): the point of the fast initial response.
    rng = np.random.default_rng(11)
    plain, fir = [], []
    for _ in range(200):
        values = (rng.standard_normal(200) + 1.0).tolist()
        plain.append(feed(Cusum(h=5.0), values)[0].index)
        fir.append(feed(Cusum(h=5.0, headstart=2.5), values)[0].index)
    assert all(f <= p for f, p in zip(fir, plain, strict=True))
    assert np.mean(fir) < 0.8 * np.mean(plain)


def test_cusum_state_is_plain_json():
    det = Cusum(k=0.25, h=3.0, headstart=1.0)
    feed(det, [0.3, 0.9, -0.2])
    data = json.loads(json.dumps(det.state(), allow_nan=False))
    assert data["params"] == {"k": 0.25, "h": 3.0, "headstart": 1.0}
    assert Cusum.from_state(data).state() == det.state()


@pytest.mark.parametrize(
    "params",
    [{"k": -0.1}, {"h": 0.0}, {"h": math.inf}, {"headstart": 5.0}, {"headstart": -1.0}],
)
def test_cusum_refuses_bad_parameters(params):
    with pytest.raises(ValueError):
        Cusum(**params)
