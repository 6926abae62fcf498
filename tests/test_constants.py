"""The derived moving-range factors against printed tables, numerical integration and simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from limitwatch.stats import constants as c

# --- printed tables -------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("name", "printed", "decimals"),
    [
        # Montgomery, Introduction to Statistical Quality Control, Appendix VI, row n = 2
        # (also ASTM MNL 7 / ASTM E2587 factor tables): d2 1.128, d3 0.853, D3 0, D4 3.267.
        ("D2", 1.128, 3),
        ("D3_SD", 0.853, 3),
        ("D3", 0.0, 3),
        ("D4", 3.267, 3),
        # Montgomery, Appendix VI, column "D2" (range-chart factor d2 + 3 d3, sigma known),
        # n = 2: 3.686 (from memory).
        ("MR_UCL_SIGMA", 3.686, 3),
        # Wheeler, limits from the median moving range: 3.145 (from memory).
        ("MEDIAN_X_FACTOR", 3.145, 3),
        # Median of the range of two normals in sigma units, 0.954 (Wheeler, from memory).
        ("MEDIAN_MR_D", 0.954, 3),
    ],
)
def test_matches_printed_table(name: str, printed: float, decimals: int) -> None:
    assert round(getattr(c, name), decimals) == pytest.approx(printed, abs=1e-12)


def test_e2_matches_table_built_from_rounded_d2() -> None:
    # Wheeler & Chambers, Understanding SPC, XmR factor table; ASTM MNL 7: E2 = 2.660 for n = 2.
    # The printed value is 3 / 1.128 (the rounded d2) = 2.6596; the exact 3/d2 is 2.6587, so
    # agreement is to the rounding of the table's d2, not to its last printed digit.
    assert round(3 / round(c.D2, 3), 3) == pytest.approx(2.660, abs=1e-12)
    assert pytest.approx(2.660, abs=1.5e-3) == c.E2


def test_median_mr_limit_factor_matches_wheeler() -> None:
    # Wheeler, upper limit for moving ranges from the median moving range: 3.865 (from memory).
    # It is printed from rounded parts ((1.128 + 3 * 0.853) / 0.954 = 3.8648); the exact
    # (d2 + 3 d3) / median factor is 3.8641.
    built_from_rounded = (round(c.D2, 3) + 3 * round(c.D3_SD, 3)) / round(c.MEDIAN_MR_D, 3)
    assert round(built_from_rounded, 3) == pytest.approx(3.865, abs=1e-12)
    assert pytest.approx(3.865, abs=1.5e-3) == c.MEDIAN_MR_UCL_FACTOR


# --- independent numerical computation (scipy) ---------------------------------------------


def _phi(x: float) -> float:
    return math.exp(-0.5 * x * x) / math.sqrt(2.0 * math.pi)


def _range_density_n2(r: float) -> float:
    """Density of the range of two iid N(0, 1): n(n-1) * integral phi(x) phi(x + r) dx, n = 2
    (the general range density with the [Phi(x+r) - Phi(x)]^(n-2) factor equal to 1)."""
    value, _ = integrate.quad(lambda x: _phi(x) * _phi(x + r), -np.inf, np.inf)
    return 2.0 * value


def test_d2_d3_by_integrating_the_range_density() -> None:
    total, _ = integrate.quad(_range_density_n2, 0, np.inf)
    m1, _ = integrate.quad(lambda r: r * _range_density_n2(r), 0, np.inf)
    m2, _ = integrate.quad(lambda r: r * r * _range_density_n2(r), 0, np.inf)
    assert total == pytest.approx(1.0, abs=1e-9)
    # nested quadrature is good to about 1e-9; a wrong closed form would be off by far more
    assert pytest.approx(m1, rel=1e-7) == c.D2
    assert pytest.approx(math.sqrt(m2 - m1 * m1), rel=1e-7) == c.D3_SD


def test_d2_by_tippett_integral() -> None:
    # Tippett (1925), Biometrika 17: E(range) = integral of 1 - Phi^n - (1 - Phi)^n, here n = 2.
    def integrand(x: float) -> float:
        p = stats.norm.cdf(x)
        return 1.0 - p**2 - (1.0 - p) ** 2

    value, _ = integrate.quad(integrand, -np.inf, np.inf)
    assert pytest.approx(value, rel=1e-9) == c.D2


def test_median_factor_against_scipy_halfnorm() -> None:
    # |X1 - X2| with X ~ N(0, 1) is half-normal with scale sqrt(2).
    median = stats.halfnorm(scale=math.sqrt(2)).median()
    assert pytest.approx(median, rel=1e-12) == c.MEDIAN_MR_D
    assert pytest.approx(3 / median, rel=1e-12) == c.MEDIAN_X_FACTOR


def test_mr_upper_limit_tail_probability() -> None:
    # The MR upper limit d2 + 3 d3 leaves about 0.9% of moving ranges above it (the range of two
    # is skewed, so not the 0.135% of a normal tail): check via scipy's half-normal.
    tail = stats.halfnorm(scale=math.sqrt(2)).sf(c.MR_UCL_SIGMA)
    assert 0.008 < tail < 0.01
    assert pytest.approx(c.D4 * c.D2, rel=1e-12) == c.MR_UCL_SIGMA
    assert pytest.approx(c.MR_UCL_SIGMA, rel=1e-12) == c.MEDIAN_MR_UCL_FACTOR * c.MEDIAN_MR_D


def test_factors_agree_with_each_other() -> None:
    assert pytest.approx(3.0, rel=1e-15) == c.E2 * c.D2
    assert pytest.approx(3.0, rel=1e-15) == c.MEDIAN_X_FACTOR * c.MEDIAN_MR_D
    assert 1 - 3 * c.D3_SD / c.D2 < 0 and c.D3 == 0.0


# --- Monte Carlo sanity check ----------------------------------------------------------------


def test_monte_carlo_moving_ranges() -> None:
    rng = np.random.default_rng(20240611)
    x = rng.standard_normal(400_001)
    mr = np.abs(np.diff(x))[::2]  # non-overlapping pairs: independent moving ranges
    n = mr.size
    se_mean = c.D3_SD / math.sqrt(n)
    assert abs(mr.mean() - c.D2) < 5 * se_mean
    assert mr.std(ddof=1) == pytest.approx(c.D3_SD, abs=0.01)
    assert np.median(mr) == pytest.approx(c.MEDIAN_MR_D, abs=0.01)


def test_factor_table_lists_every_factor() -> None:
    table = c.factor_table()
    assert table["d2"] == c.D2
    assert table["d3"] == c.D3_SD
    assert table["E2"] == c.E2
    assert table["D3"] == c.D3
    assert table["D4"] == c.D4
    assert table["mr_ucl_sigma"] == c.MR_UCL_SIGMA
    assert table["median_mr_d"] == c.MEDIAN_MR_D
    assert table["median_x_factor"] == c.MEDIAN_X_FACTOR
    assert table["median_mr_ucl_factor"] == c.MEDIAN_MR_UCL_FACTOR
    assert all(isinstance(v, float) for v in table.values())
