"""Phase I baseline fit: batch cross-checks, invariances, exclusion, bounds, refusals, round trip.

Data here is invented (seeded random numbers or hand-made sequences); every expected number is
computed independently with numpy / statistics / statsmodels or read from a printed table.
"""

from __future__ import annotations

import json
import math
import statistics

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from statsmodels.tsa.stattools import acf

from limitwatch.stats.baseline import (
    ZONES,
    Baseline,
    BaselineError,
    Exclusion,
    fit_baseline,
)
from tests.helpers import examples

# Montgomery, Introduction to Statistical Quality Control, Appendix VI, n = 2 (printed to three
# decimals): d2 1.128, D4 3.267; E2 = 3/1.128 = 2.660 (Wheeler & Chambers' XmR table).
TABLE_D2, TABLE_D4, TABLE_E2 = 1.128, 3.267, 2.660
# Wheeler, limits from the median moving range (from memory): 3.145 and 3.865; median of the
# range of two in sigma units 0.954.
TABLE_MEDIAN_X, TABLE_MEDIAN_MR, TABLE_MEDIAN_D = 3.145, 3.865, 0.954
TABLE_REL = 1.5e-3  # printed three-decimal factors, some built from rounded parts


def noisy(n: int, seed: int, loc: float = 50.0, scale: float = 1.0) -> np.ndarray:
    return np.random.default_rng(seed).normal(loc, scale, n)


# --- batch cross-checks ----------------------------------------------------------------------


def test_mean_method_matches_a_plain_computation() -> None:
    x = noisy(50, seed=1)
    b = fit_baseline(x)
    mrs = np.abs(np.diff(x))
    assert b.n == b.n_used == 50
    assert b.center == pytest.approx(np.mean(x), rel=1e-14)
    assert b.center == pytest.approx(statistics.fmean(x.tolist()), rel=1e-14)
    assert b.mr_bar == pytest.approx(np.mean(mrs), rel=1e-14)
    assert b.mr_median == pytest.approx(statistics.median(mrs.tolist()), rel=1e-14)
    assert b.sigma == pytest.approx(np.mean(mrs) / TABLE_D2, rel=TABLE_REL)
    assert b.ucl == pytest.approx(b.center + TABLE_E2 * b.mr_bar, rel=TABLE_REL)
    assert b.lcl == pytest.approx(b.center - TABLE_E2 * b.mr_bar, rel=TABLE_REL)
    assert b.mr_ucl == pytest.approx(TABLE_D4 * b.mr_bar, rel=TABLE_REL)
    # both methods put the limits at three sigma
    assert b.ucl == pytest.approx(b.center + 3 * b.sigma, rel=1e-14)
    assert b.sigma_overall == pytest.approx(statistics.stdev(x.tolist()), rel=1e-12)
    assert (b.method, b.excluded, b.exclusions, b.iterations, b.converged) == (
        "mean",
        (),
        (),
        0,
        True,
    )
    assert b.capability is None and b.warnings == ()


def test_median_method_matches_a_plain_computation() -> None:
    x = noisy(40, seed=2, loc=120.0, scale=3.0)
    b = fit_baseline(x, method="median")
    med = statistics.median(np.abs(np.diff(x)).tolist())
    assert b.method == "median"
    assert b.center == pytest.approx(statistics.fmean(x.tolist()), rel=1e-14)
    assert b.mr_median == pytest.approx(med, rel=1e-14)
    assert b.mr_bar == pytest.approx(np.mean(np.abs(np.diff(x))), rel=1e-14)
    assert b.sigma == pytest.approx(med / TABLE_MEDIAN_D, rel=TABLE_REL)
    half = b.ucl - b.center
    assert half == pytest.approx(TABLE_MEDIAN_X * med, rel=TABLE_REL)
    assert b.center - b.lcl == pytest.approx(half, rel=1e-12)
    assert b.mr_ucl == pytest.approx(TABLE_MEDIAN_MR * med, rel=TABLE_REL)
    assert b.ucl == pytest.approx(b.center + 3 * b.sigma, rel=1e-14)


def test_median_method_resists_a_few_large_jumps() -> None:
    x = noisy(60, seed=9)
    x[[15, 40]] += 12.0
    by_mean, by_median = fit_baseline(x), fit_baseline(x, method="median")
    clean_sigma = fit_baseline(np.delete(x, [15, 40]), method="median").sigma
    assert by_median.sigma == pytest.approx(clean_sigma, rel=0.1)
    assert by_mean.sigma > 1.3 * by_median.sigma


# --- invariances (hypothesis) ----------------------------------------------------------------

# Readings on a 1/8 grid: differences and shifts are exact in binary floating point, so the
# moving ranges of shifted data are bit-for-bit the same and sigma must not move at all.
grid_values = st.lists(st.integers(-4000, 4000), min_size=10, max_size=60).map(
    lambda v: np.array(v, dtype=float) / 8.0
)


def _fit_or_error(x: np.ndarray, **kw) -> Baseline | None:
    try:
        return fit_baseline(x, **kw)
    except BaselineError:
        return None


@settings(max_examples=examples(150), deadline=None)
@given(
    x=grid_values,
    shift=st.integers(-80_000, 80_000).map(lambda k: k / 8.0),
    method=st.sampled_from(["mean", "median"]),
    exclude=st.booleans(),
)
def test_shifting_moves_center_and_limits_but_not_sigma(x, shift, method, exclude) -> None:
    kw = {"method": method, "exclude_beyond": exclude}
    b = _fit_or_error(x, **kw)
    moved = _fit_or_error(x + shift, **kw)
    assert (b is None) == (moved is None)
    if b is None:
        return
    tol = 1e-12 * (abs(shift) + np.max(np.abs(x)) + 1.0)
    assert moved.sigma == b.sigma
    assert moved.mr_bar == b.mr_bar and moved.mr_median == b.mr_median
    assert moved.center == pytest.approx(b.center + shift, abs=tol)
    assert moved.ucl == pytest.approx(b.ucl + shift, abs=tol)
    assert moved.lcl == pytest.approx(b.lcl + shift, abs=tol)
    assert moved.mr_ucl == b.mr_ucl
    assert moved.excluded == b.excluded
    assert moved.sigma_overall == pytest.approx(b.sigma_overall, rel=1e-9)


@settings(max_examples=examples(150), deadline=None)
@given(
    x=grid_values,
    c=st.floats(min_value=1e-3, max_value=1e3),
    method=st.sampled_from(["mean", "median"]),
)
def test_scaling_scales_sigma_and_limits(x, c, method) -> None:
    b = _fit_or_error(x, method=method)
    assume(b is not None)
    scaled = fit_baseline(x * c, method=method)
    assert scaled.sigma == pytest.approx(b.sigma * c, rel=1e-12)
    assert scaled.center == pytest.approx(b.center * c, rel=1e-12, abs=1e-12 * c * b.sigma)
    assert scaled.ucl - scaled.center == pytest.approx((b.ucl - b.center) * c, rel=1e-9)
    assert scaled.mr_ucl == pytest.approx(b.mr_ucl * c, rel=1e-12)
    assert scaled.lag1_autocorrelation == pytest.approx(b.lag1_autocorrelation, abs=1e-9)


@settings(max_examples=examples(100), deadline=None)
@given(
    x=grid_values,
    k=st.integers(-20, 20),
    method=st.sampled_from(["mean", "median"]),
)
def test_scaling_by_a_power_of_two_is_exact_even_with_exclusion(x, k, method) -> None:
    # multiplying by 2**k changes no rounding, so every decision and number scales exactly
    c = 2.0**k
    b = _fit_or_error(x, method=method, exclude_beyond=True)
    scaled = _fit_or_error(x * c, method=method, exclude_beyond=True)
    assert (b is None) == (scaled is None)
    if b is None:
        return
    assert scaled.excluded == b.excluded
    assert [(e.position, e.kind, e.iteration) for e in scaled.exclusions] == [
        (e.position, e.kind, e.iteration) for e in b.exclusions
    ]
    assert (scaled.center, scaled.sigma, scaled.ucl, scaled.mr_ucl) == (
        b.center * c,
        b.sigma * c,
        b.ucl * c,
        b.mr_ucl * c,
    )


# --- exclusion -------------------------------------------------------------------------------


def test_one_wild_reading_is_excluded_and_recorded() -> None:
    x = noisy(30, seed=7)
    x[12] = 80.0
    first_ucl = np.mean(x) + TABLE_E2 * np.mean(np.abs(np.diff(x)))
    b = fit_baseline(x, exclude_beyond=True)
    assert b.excluded == (12,)
    assert len(b.exclusions) == 1
    ex = b.exclusions[0]
    assert (ex.position, ex.kind, ex.iteration, ex.value) == (12, "x-beyond-limits", 1, 80.0)
    assert ex.limit == pytest.approx(first_ucl, rel=TABLE_REL)
    assert (b.iterations, b.converged, b.n, b.n_used) == (1, True, 30, 29)
    # the refit uses the other readings and only the moving ranges between kept neighbours
    kept = np.delete(x, 12)
    mrs = np.concatenate([np.abs(np.diff(x[:12])), np.abs(np.diff(x[13:]))])
    assert mrs.size == 27
    assert b.center == pytest.approx(np.mean(kept), rel=1e-14)
    assert b.mr_bar == pytest.approx(np.mean(mrs), rel=1e-14)
    assert b.sigma_overall == pytest.approx(statistics.stdev(kept.tolist()), rel=1e-12)
    # without exclusion the wild reading stays and inflates the spread
    plain = fit_baseline(x)
    assert plain.excluded == () and plain.mr_bar > 2 * b.mr_bar


def test_a_large_moving_range_is_left_out_of_the_mr_statistic_only() -> None:
    # two steady stretches, one jump of 4 between them (hand-made)
    x = [10.0, 11.0] * 7 + [15.0, 14.0] * 7
    b = fit_baseline(x, exclude_beyond=True)
    # first pass: MRbar = (26 * 1 + 4) / 27, MR upper limit = D4 * MRbar = 3.63 < 4
    assert len(b.exclusions) == 1
    ex = b.exclusions[0]
    assert (ex.position, ex.kind, ex.iteration, ex.value) == (14, "mr-beyond-limit", 1, 4.0)
    assert ex.limit == pytest.approx(TABLE_D4 * 30 / 27, rel=TABLE_REL)
    assert b.excluded == () and b.n_used == 28
    assert b.center == pytest.approx(12.5, abs=1e-12)
    assert b.mr_bar == 1.0 and b.mr_median == 1.0
    assert b.converged and b.iterations == 1


def _layered_outliers() -> np.ndarray:
    # each outlier is hidden by the spread the larger ones cause, so one is revealed per round
    x = np.random.default_rng(3).uniform(-1.0, 1.0, 60)
    x[[10, 25, 40, 55]] = [10_000.0, 1_000.0, 100.0, 12.0]
    return x


def test_iteration_cap_stops_and_says_so() -> None:
    x = _layered_outliers()
    b = fit_baseline(x, exclude_beyond=True, max_iterations=2)
    assert [(e.position, e.kind, e.iteration) for e in b.exclusions] == [
        (10, "x-beyond-limits", 1),
        (25, "x-beyond-limits", 2),
    ]
    assert b.iterations == 2 and not b.converged
    assert b.excluded == (10, 25) and b.n_used == 58
    assert x[40] > b.ucl  # still beyond the final limits
    assert any("stopped after 2" in w for w in b.warnings)


def test_iteration_converges_when_nothing_more_is_beyond() -> None:
    x = _layered_outliers()
    b = fit_baseline(x, exclude_beyond=True, max_iterations=10)
    assert [(e.position, e.iteration) for e in b.exclusions] == [(10, 1), (25, 2), (40, 3), (55, 4)]
    assert all(e.kind == "x-beyond-limits" for e in b.exclusions)
    assert all(e.value > e.limit for e in b.exclusions)
    assert b.iterations == 4 and b.converged
    kept = np.delete(x, [10, 25, 40, 55])
    assert np.all((kept <= b.ucl) & (kept >= b.lcl))
    assert not any("stopped" in w for w in b.warnings)


def test_exclusion_that_leaves_too_few_readings_is_refused() -> None:
    x = [5.0, 5.2, 4.9, 5.1, 5.0, 40.0, 5.1, 4.8, 5.0, 5.2, 4.9]
    assert fit_baseline(x, exclude_beyond=True).excluded == (5,)
    with pytest.raises(BaselineError, match="left 10 of 11"):
        fit_baseline(x, exclude_beyond=True, min_points=11, warn_points=11)


# --- natural bounds and zones ----------------------------------------------------------------


def test_lower_bound_switches_off_an_impossible_lcl() -> None:
    # invented downtime minutes per shift: skewed, never below zero
    x = np.round(np.random.default_rng(5).exponential(4.0, 40), 1)
    b = fit_baseline(x, lower_bound=0.0)
    mr_bar = np.mean(np.abs(np.diff(x)))
    assert b.lcl is None and b.lcl_clipped
    assert b.lcl_raw == pytest.approx(np.mean(x) - TABLE_E2 * mr_bar, rel=TABLE_REL)
    assert b.lcl_raw < 0
    assert b.ucl is not None and not b.ucl_clipped
    assert b.lower_bound == 0.0
    # zones below the center still work for run tests
    assert b.zone(b.center - 0.5 * b.sigma) == "zone-c-lower"
    assert b.zone(b.center - 1.5 * b.sigma) == "zone-b-lower"
    unbounded = fit_baseline(x)
    assert unbounded.lcl == pytest.approx(b.lcl_raw) and not unbounded.lcl_clipped


def test_upper_bound_switches_off_an_impossible_ucl() -> None:
    x = np.minimum(noisy(30, seed=8, loc=99.0, scale=0.8), 100.0)
    b = fit_baseline(x, upper_bound=100.0)
    assert b.ucl is None and b.ucl_clipped and b.ucl_raw > 100.0
    assert b.lcl is not None


def test_zone_boundaries() -> None:
    b = Baseline.from_limits(center=10.0, sigma=2.0)
    cases = {
        16.5: "above-ucl",
        16.0: "zone-a-upper",
        14.5: "zone-a-upper",
        14.0: "zone-b-upper",
        12.0: "zone-c-upper",
        10.0: "center",
        9.0: "zone-c-lower",
        7.5: "zone-b-lower",
        5.0: "zone-a-lower",
        3.9: "below-lcl",
    }
    assert {v: b.zone(v) for v in cases} == cases
    assert set(cases.values()) == set(ZONES)
    with pytest.raises(ValueError):
        b.zone(float("nan"))


# --- refusals --------------------------------------------------------------------------------


def test_too_few_readings() -> None:
    with pytest.raises(BaselineError, match=r"only 9 readings, fewer than the 10") as info:
        fit_baseline(noisy(9, seed=1))
    assert "min_points" in str(info.value)
    assert issubclass(BaselineError, ValueError)


def test_few_readings_give_a_provisional_warning() -> None:
    b = fit_baseline(noisy(15, seed=4))
    assert any(
        "limits from fewer than 20 points are provisional (common practice)" in w
        for w in b.warnings
    )
    assert fit_baseline(noisy(20, seed=4)).warnings == ()


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), -float("inf")])
def test_non_finite_reading_is_refused_with_its_position(bad: float) -> None:
    x = noisy(25, seed=3)
    x[17] = bad
    with pytest.raises(BaselineError, match="position 17"):
        fit_baseline(x)


def test_constant_readings_are_refused() -> None:
    with pytest.raises(BaselineError, match="do not vary"):
        fit_baseline([7.25] * 30)


def test_median_method_refuses_mostly_repeated_readings() -> None:
    x = [5.0] * 8 + [6.0] + [5.0] * 8  # coarse resolution: most moving ranges are zero
    assert fit_baseline(x).sigma > 0
    with pytest.raises(BaselineError, match="median"):
        fit_baseline(x, method="median")


def test_reading_beyond_a_natural_bound_is_refused_with_its_position() -> None:
    x = np.abs(noisy(25, seed=6, loc=3.0))
    x[4] = -0.5
    with pytest.raises(BaselineError, match=r"position 4 .*lower_bound"):
        fit_baseline(x, lower_bound=0.0)
    x[4] = 1.0
    x[20] = 150.0
    with pytest.raises(BaselineError, match=r"position 20 .*upper_bound"):
        fit_baseline(x, lower_bound=0.0, upper_bound=100.0)


def test_bad_arguments_are_refused() -> None:
    x = noisy(25, seed=1)
    with pytest.raises(BaselineError, match="method"):
        fit_baseline(x, method="mode")
    with pytest.raises(BaselineError, match="shape"):
        fit_baseline(x.reshape(5, 5))
    with pytest.raises(BaselineError, match="lower_bound"):
        fit_baseline(x, lower_bound=60.0, upper_bound=40.0)
    with pytest.raises(ValueError, match=r"spec_lower \(60.0\).*spec_upper \(40.0\)"):
        fit_baseline(x, spec_lower=60.0, spec_upper=40.0)


# --- autocorrelation -------------------------------------------------------------------------


def test_autocorrelation_is_measured_and_warned_about() -> None:
    rng = np.random.default_rng(12)
    e = rng.normal(0.0, 1.0, 300)
    ar = np.empty(300)
    ar[0] = e[0]
    for t in range(1, 300):  # AR(1) with phi = 0.8: a slowly wandering temperature
        ar[t] = 0.8 * ar[t - 1] + e[t]
    b = fit_baseline(ar + 70.0)
    expected = acf(ar + 70.0, nlags=1, fft=False)[1]  # statsmodels' sample ACF
    assert b.lag1_autocorrelation == pytest.approx(expected, rel=1e-10)
    assert b.lag1_autocorrelation > 0.6
    assert any("autocorrelation" in w and "too tight" in w for w in b.warnings)

    white = fit_baseline(e + 70.0)
    assert white.lag1_autocorrelation == pytest.approx(acf(e, nlags=1, fft=False)[1], rel=1e-9)
    assert not any("autocorrelation" in w for w in white.warnings)
    # the threshold is the caller's
    assert not any(
        "autocorrelation" in w for w in fit_baseline(ar, autocorrelation_threshold=0.95).warnings
    )


def test_autocorrelation_skips_excluded_readings() -> None:
    x = noisy(40, seed=21)
    x[20] = 90.0
    b = fit_baseline(x, exclude_beyond=True)
    assert b.excluded == (20,)
    kept = np.delete(x, 20)
    assert b.lag1_autocorrelation == pytest.approx(acf(kept, nlags=1, fft=False)[1], rel=1e-10)


# --- numerical edge case ---------------------------------------------------------------------


def test_large_offset_with_tiny_spread() -> None:
    # readings near 1e6 varying in the sixth decimal place: float64 keeps about four digits of
    # the spread, and the fit must not lose them
    x = 1e6 + np.random.default_rng(31).normal(0.0, 1e-6, 60)
    xs = x.tolist()
    b = fit_baseline(x)
    assert b.center == pytest.approx(statistics.mean(xs), abs=3e-10)  # exact-rational mean
    mrs = [abs(a - c) for a, c in zip(xs[1:], xs[:-1], strict=True)]  # exact (Sterbenz)
    assert b.mr_bar == pytest.approx(statistics.mean(mrs), rel=1e-12)
    assert b.sigma == pytest.approx(statistics.mean(mrs) / TABLE_D2, rel=TABLE_REL)
    assert 5e-7 < b.sigma < 2e-6
    assert b.sigma_overall == pytest.approx(statistics.stdev(xs), rel=1e-6)
    offsets = x - 1e6  # exact subtraction, so this is an accurate reference
    ref_acf = acf(offsets, nlags=1, fft=False)[1]
    assert b.lag1_autocorrelation == pytest.approx(ref_acf, abs=1e-6)
    assert b.zone(b.center + 0.5 * b.sigma) == "zone-c-upper"
    assert b.zone(b.center + 4 * b.sigma) == "above-ucl"


# --- construction and round trip -------------------------------------------------------------


def test_round_trip_through_json() -> None:
    x = np.round(np.random.default_rng(41).exponential(5.0, 45), 2)
    x[30] = 80.0
    b = fit_baseline(x, exclude_beyond=True, lower_bound=0.0, spec_upper=30.0)
    assert b.exclusions and b.lcl_clipped and b.capability is not None
    data = json.loads(json.dumps(b.to_dict()))
    for key in ("center", "mr_bar", "sigma", "ucl", "lcl", "mr_ucl", "n", "excluded"):
        assert key in data
    assert data["excluded"] == list(b.excluded)
    assert data["cpk"] == b.capability.cpk and data["cp"] is None and data["pp"] is None
    assert data["ppk"] == b.capability.ppk
    back = Baseline.from_dict(data)
    assert back == b
    assert isinstance(back.exclusions[0], Exclusion)


def test_round_trip_without_capability_and_missing_key() -> None:
    b = fit_baseline(noisy(25, seed=2), method="median")
    assert Baseline.from_dict(b.to_dict()) == b
    data = b.to_dict()
    del data["mr_ucl"]
    with pytest.raises(BaselineError, match="mr_ucl"):
        Baseline.from_dict(data)


def test_a_stored_baseline_read_back_without_checks_equals_the_checked_one() -> None:
    """``from_stored`` (restart path, trusts what the store wrote) and ``from_dict`` agree on
    every kind of baseline, and a document of another shape takes the checked path."""
    x = np.round(np.random.default_rng(41).exponential(5.0, 45), 2)
    x[30] = 80.0
    fitted = [
        fit_baseline(x, exclude_beyond=True, lower_bound=0.0, spec_upper=30.0),
        fit_baseline(noisy(25, seed=2), method="median"),
        fit_baseline(noisy(12, seed=3), warn_points=20),
        Baseline.from_limits(center=20.0, sigma=1.5, lower_bound=16.0, spec_lower=14.0),
    ]
    assert fitted[0].exclusions and fitted[0].capability and fitted[2].warnings
    for b in fitted:
        data = json.loads(json.dumps(b.to_dict()))
        stored = Baseline.from_stored(data)
        assert stored == Baseline.from_dict(data) == b
        assert hash(stored) == hash(b)  # made without __init__: still a whole, frozen baseline
        assert isinstance(stored.excluded, tuple) and isinstance(stored.exclusions, tuple)
        assert isinstance(stored.warnings, tuple)
        with pytest.raises(AttributeError):
            stored.center = 0.0  # type: ignore[misc]
    data = fitted[1].to_dict()
    del data["mr_ucl"]
    with pytest.raises(BaselineError, match="mr_ucl"):
        Baseline.from_stored(data)
    data["extra"] = 1.0  # as many keys as to_dict writes, one unknown
    with pytest.raises(BaselineError, match="mr_ucl"):
        Baseline.from_stored(data)
    data = {**fitted[1].to_dict(), "method": "mode"}
    with pytest.raises(BaselineError, match="method"):
        Baseline.from_stored(data)


def test_from_limits_uses_the_factors_sigma_implies() -> None:
    b = Baseline.from_limits(center=20.0, sigma=1.5, lower_bound=16.0, spec_lower=14.0)
    assert (b.ucl, b.lcl_raw) == (24.5, 15.5)
    assert b.lcl is None and b.lcl_clipped
    assert b.mr_bar == pytest.approx(TABLE_D2 * 1.5, rel=TABLE_REL)
    # Montgomery, Appendix VI, range-chart factor "D2" = d2 + 3 d3 = 3.686 for n = 2
    assert b.mr_ucl == pytest.approx(3.686 * 1.5, rel=TABLE_REL)
    assert b.capability.cpk == pytest.approx((20.0 - 14.0) / 4.5)
    assert b.capability.ppk is None
    assert b.n == 0 and b.lag1_autocorrelation is None
    assert Baseline.from_dict(b.to_dict()) == b
    with pytest.raises(BaselineError, match="sigma"):
        Baseline.from_limits(center=1.0, sigma=0.0)


def test_a_fit_and_its_own_limits_agree() -> None:
    b = fit_baseline(noisy(30, seed=17))
    typed = Baseline.from_limits(center=b.center, sigma=b.sigma)
    assert typed.ucl == pytest.approx(b.ucl, rel=1e-14)
    assert typed.mr_ucl == pytest.approx(b.mr_ucl, rel=1e-14)
    assert typed.mr_bar == pytest.approx(b.mr_bar, rel=1e-14)
    assert math.isclose(typed.z(b.ucl), 3.0, rel_tol=1e-12)


def test_unusable_input_is_refused_as_a_baseline_error() -> None:
    with pytest.raises(BaselineError, match="numbers"):
        fit_baseline(["warm"] * 12)
    with pytest.raises(BaselineError, match="overflows"):
        fit_baseline([1e308, -1e308] * 6)
