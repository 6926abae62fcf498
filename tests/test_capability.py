"""Capability indices: a handbook worked example, the definitions, and Pp/Ppk from real std."""

from __future__ import annotations

import statistics

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from limitwatch.stats.baseline import fit_baseline
from limitwatch.stats.capability import Capability, compute_capability


def test_nist_handbook_worked_example() -> None:
    # NIST/SEMATECH e-Handbook of Statistical Methods, section 6.1.6 (from memory):
    # USL 20, LSL 8, mean 16, sigma 2 -> Cp = 12/12 = 1.0, Cpk = min(4/6, 8/6) = 0.667.
    cap = compute_capability(16.0, 2.0, 2.0, spec_lower=8.0, spec_upper=20.0)
    assert cap.cp == pytest.approx(1.0)
    assert round(cap.cpk, 3) == pytest.approx(0.667)
    assert cap.cpu == pytest.approx(4 / 6)
    assert cap.cpl == pytest.approx(8 / 6)
    # same sigma for both, so the performance indices agree
    assert (cap.pp, cap.ppk) == pytest.approx((cap.cp, cap.cpk))


def test_one_sided_specifications() -> None:
    upper_only = compute_capability(10.0, 1.0, 2.0, spec_upper=13.0)
    assert upper_only.cp is None and upper_only.pp is None
    assert upper_only.cpl is None and upper_only.ppl is None
    assert upper_only.cpk == pytest.approx(1.0) == upper_only.cpu
    assert upper_only.ppk == pytest.approx(0.5) == upper_only.ppu

    lower_only = compute_capability(10.0, 0.5, 1.0, spec_lower=7.0)
    assert lower_only.cp is None and lower_only.cpu is None
    assert lower_only.cpk == pytest.approx(2.0) == lower_only.cpl
    assert lower_only.ppk == pytest.approx(1.0)


def test_reversed_spec_limits_name_both() -> None:
    with pytest.raises(ValueError) as info:
        compute_capability(10.0, 1.0, 1.0, spec_lower=12.5, spec_upper=7.25)
    assert "12.5" in str(info.value) and "7.25" in str(info.value)
    with pytest.raises(ValueError, match=r"3\.0"):
        compute_capability(10.0, 1.0, 1.0, spec_lower=3.0, spec_upper=3.0)


def test_needs_a_spec_limit_and_a_positive_sigma() -> None:
    with pytest.raises(ValueError, match="specification"):
        compute_capability(10.0, 1.0, 1.0)
    with pytest.raises(ValueError, match="sigma_within"):
        compute_capability(10.0, 0.0, 1.0, spec_upper=12.0)
    with pytest.raises(ValueError, match="sigma_overall"):
        compute_capability(10.0, 1.0, float("nan"), spec_upper=12.0)


def test_missing_overall_sigma_leaves_performance_indices_empty() -> None:
    cap = compute_capability(10.0, 1.0, None, spec_lower=7.0, spec_upper=13.0)
    assert cap.cp == pytest.approx(1.0)
    assert (cap.pp, cap.ppk, cap.ppu, cap.ppl) == (None, None, None, None)


finite = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False)
positive = st.floats(min_value=1e-3, max_value=1e3)


@given(center=finite, sigma=positive, lower=finite, width=positive)
def test_definitions(center: float, sigma: float, lower: float, width: float) -> None:
    # Montgomery, Introduction to SQC, process capability chapter: Cp = (USL - LSL) / 6 sigma,
    # Cpk = min(Cpu, Cpl) <= Cp, equality when centered; Cp is the mean of Cpu and Cpl.
    upper = lower + width
    cap = compute_capability(center, sigma, sigma, spec_lower=lower, spec_upper=upper)
    assert cap.cp == pytest.approx((upper - lower) / (6 * sigma))
    assert cap.cpk == min(cap.cpu, cap.cpl)
    # rounding of (USL - center) and (center - LSL) scales with the larger one-sided index
    tol = 1e-12 * max(abs(cap.cpu), abs(cap.cpl), 1.0)
    assert cap.cpk <= cap.cp + tol
    assert (cap.cpu + cap.cpl) / 2 == pytest.approx(cap.cp, abs=tol)
    centered = compute_capability((lower + upper) / 2, sigma, sigma, lower, upper)
    assert centered.cpk == pytest.approx(centered.cp, rel=1e-9)


def test_pp_ppk_use_sample_std_of_the_baseline_history() -> None:
    rng = np.random.default_rng(11)
    # invented demo data: a slow drift on top of reading-to-reading noise, so that the overall
    # spread exceeds the within (moving-range) spread
    x = 50 + rng.normal(0, 1, 120) + np.linspace(-2, 2, 120)
    b = fit_baseline(x, spec_lower=40.0, spec_upper=62.0)
    s = np.std(x, ddof=1)
    assert s == pytest.approx(statistics.stdev(x.tolist()), rel=1e-12)
    assert b.sigma_overall == pytest.approx(s, rel=1e-12)
    mean = statistics.fmean(x.tolist())
    assert b.capability.pp == pytest.approx(22 / (6 * s), rel=1e-12)
    assert b.capability.ppk == pytest.approx(min(62 - mean, mean - 40) / (3 * s), rel=1e-12)
    mr_sigma = np.mean(np.abs(np.diff(x))) / 1.128  # d2 = 1.128, Montgomery Appendix VI
    assert b.capability.cp == pytest.approx(22 / (6 * mr_sigma), rel=1e-3)
    # the drift inflates the overall sigma, so performance is below capability
    assert b.capability.ppk < b.capability.cpk


def test_round_trip() -> None:
    cap = compute_capability(16.0, 2.0, 2.5, spec_lower=8.0, spec_upper=20.0)
    assert Capability.from_dict(cap.to_dict()) == cap
    assert cap.to_dict()["spec_upper"] == 20.0
