"""Average run lengths of the real detectors against published tables.

Each check simulates run lengths by feeding standard normal readings (plus a shift, in sigma)
one at a time through detectors made by ``build_detectors(parse_rules(...))``, from a seeded
numpy generator. The tolerance is four standard errors of the simulated mean, computed from the
simulated run lengths themselves (and printed; run ``pytest -s`` to see them). Every reference
value names its source; values quoted from memory say so, and where a memory could be checked
by an independent computation (Markov chain, Siegmund's formula) that is done too.

Phase II, known parameters: the detectors see ``z = (x - mu) / sigma`` with exact mu and sigma,
as in the tables.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import norm

from limitwatch.stats.rules import build_detectors, parse_rules

MAX_RUN = 200_000
RUNS = 10_000  # standard errors of about 1% of the ARL


def run_length(updates, rng: np.random.Generator, shift: float, chunk: int = 256) -> int:
    """Readings until the first signal of any of ``updates`` (bound methods of fresh detectors)."""
    i = 0
    while i < MAX_RUN:
        for z in (rng.standard_normal(chunk) + shift).tolist():
            for update in updates:
                if update(i, z) is not None:
                    return i + 1
            i += 1
    raise AssertionError(f"no signal in {MAX_RUN} readings")


def simulate(selection: str, shift: float, runs: int, seed: int) -> np.ndarray:
    specs = parse_rules(selection)
    rng = np.random.default_rng(seed)
    lengths = np.empty(runs)
    for r in range(runs):
        updates = [d.update for d in build_detectors(specs)]
        lengths[r] = run_length(updates, rng, shift)
    return lengths


def check_arl(label: str, lengths: np.ndarray, published: float) -> None:
    mean = lengths.mean()
    se = lengths.std(ddof=1) / math.sqrt(len(lengths))
    runs = len(lengths)
    print(
        f"{label}: simulated ARL {mean:.2f} (SE {se:.2f}, {runs} runs), published {published:.2f}"
    )
    assert se < 0.04 * mean, "too few runs for a meaningful check"
    assert abs(mean - published) < 4 * se


# ------------------------------------------------------------------------------------------
# Shewhart chart alone: exact values from the normal distribution (scipy.stats.norm)
# ------------------------------------------------------------------------------------------


@pytest.mark.slow  # simulates 10,000 in-control run lengths; the Markov-chain checks stay fast
def test_three_sigma_limits_in_control():
    # ARL0 = 1 / P(|Z| > 3) = 370.4 for the 3-sigma Shewhart chart (Montgomery).
    published = 1 / (2 * norm.sf(3.0))
    check_arl("beyond-limits, in control", simulate("beyond-limits", 0.0, RUNS, seed=1), published)


def test_three_sigma_limits_after_a_one_sigma_shift():
    # ARL = 1 / (P(Z > 2) + P(Z < -4)) = 43.9 for a shift of one sigma.
    published = 1 / (norm.sf(2.0) + norm.cdf(-4.0))
    check_arl("beyond-limits, shift 1", simulate("beyond-limits", 1.0, RUNS, seed=2), published)


# ------------------------------------------------------------------------------------------
# Western Electric rules, zero-state ARLs by Markov chain
# Champ, C. W. & Woodall, W. H. (1987), Technometrics 29(4), 393-399 (from memory).
# ------------------------------------------------------------------------------------------

WESTERN_ELECTRIC_1_TO_4 = "beyond-limits, two-of-three-zone-a, four-of-five-zone-b, run-one-side"


@pytest.mark.slow  # simulates 10,000 in-control run lengths; the Markov-chain checks stay fast
def test_western_electric_rules_one_to_four_in_control():
    # Champ & Woodall (1987): rules 1, 2, 3 and 4 together, ARL0 = 91.75 (from memory).
    check_arl(
        "WE rules 1-4, in control", simulate(WESTERN_ELECTRIC_1_TO_4, 0.0, RUNS, seed=3), 91.75
    )


@pytest.mark.slow  # simulates 10,000 in-control run lengths; the Markov-chain checks stay fast
def test_western_electric_rules_one_and_two_in_control():
    # Champ & Woodall (1987): rules 1 and 2 together, ARL0 = 225.44 (from memory).
    lengths = simulate("beyond-limits, two-of-three-zone-a", 0.0, RUNS, seed=4)
    check_arl("WE rules 1+2, in control", lengths, 225.44)


# ------------------------------------------------------------------------------------------
# EWMA: Lucas & Saccucci (1990), Technometrics 32(1), as tabled in Montgomery's EWMA chapter
# (from memory): lambda 0.10, L 2.814 gives ARL0 ~ 500 and ARL 10.3 at a one-sigma shift,
# with asymptotic limits.
# ------------------------------------------------------------------------------------------


def ewma_markov_arl(lam: float, L: float, shift: float, states: int = 301) -> float:
    """Zero-state ARL by the Markov-chain method (Brook & Evans 1972; Lucas & Saccucci 1990):
    the in-control band of the asymptotic limits cut into ``states`` cells."""
    half = L * math.sqrt(lam / (2 - lam))
    width = 2 * half / states
    mid = -half + (np.arange(states) + 0.5) * width
    base = (1 - lam) * mid[:, None]
    upper = (mid[None, :] + width / 2 - base) / lam - shift
    lower = (mid[None, :] - width / 2 - base) / lam - shift
    inside = norm.cdf(upper) - norm.cdf(lower)
    arl = np.linalg.solve(np.eye(states) - inside, np.ones(states))
    return float(arl[states // 2])


@pytest.mark.parametrize(("shift", "published"), [(0.0, 500.0), (1.0, 10.3)])
def test_ewma_table_values_by_markov_chain(shift, published):
    # Checks the remembered table values independently of the detector.
    arl = ewma_markov_arl(0.10, 2.814, shift)
    assert abs(arl - ewma_markov_arl(0.10, 2.814, shift, states=151)) < 0.005 * arl  # converged
    assert arl == pytest.approx(published, rel=0.01)


def test_default_ewma_is_the_lambda_020_design_with_arl0_500():
    # Lucas & Saccucci (1990) via Montgomery's table (from memory): lambda 0.20, L 2.962 gives
    # ARL0 ~ 500 with asymptotic limits; the detector's defaults are that design.
    (det,) = build_detectors(parse_rules("ewma"))
    assert (det.lam, det.L) == (0.2, 2.962)
    assert ewma_markov_arl(det.lam, det.L, 0.0) == pytest.approx(500.0, rel=0.01)


@pytest.mark.slow  # simulates 10,000 in-control run lengths; the Markov-chain checks stay fast
def test_ewma_in_control_with_asymptotic_limits():
    lengths = simulate("ewma(lam=0.1, L=2.814, exact_startup=false)", 0.0, RUNS, seed=5)
    check_arl("EWMA 0.10/2.814 asymptotic, in control", lengths, 500.0)


def test_ewma_after_a_one_sigma_shift_with_asymptotic_limits():
    lengths = simulate("ewma(lam=0.1, L=2.814, exact_startup=false)", 1.0, RUNS, seed=6)
    check_arl("EWMA 0.10/2.814 asymptotic, shift 1", lengths, 10.3)


def test_exact_start_up_limits_shorten_the_shifted_arl():
    # Lucas & Saccucci (1990) on time-varying limits: narrower limits at the start catch a
    # shift present from the start sooner. Same readings through both detectors, so each run
    # can only end earlier with the exact limits; the mean difference must be clearly positive.
    specs_exact = parse_rules("ewma(lam=0.1, L=2.814)")
    specs_asym = parse_rules("ewma(lam=0.1, L=2.814, exact_startup=false)")
    rng = np.random.default_rng(7)
    diffs = []
    for _ in range(1500):
        values = (rng.standard_normal(400) + 1.0).tolist()
        (exact,), (asym,) = build_detectors(specs_exact), build_detectors(specs_asym)
        first_exact = next(i for i, z in enumerate(values) if exact.update(i, z) is not None)
        first_asym = next(i for i, z in enumerate(values) if asym.update(i, z) is not None)
        diffs.append(first_asym - first_exact)
    diffs = np.array(diffs)
    se = diffs.std(ddof=1) / math.sqrt(len(diffs))
    print(
        f"EWMA shift 1: asymptotic minus exact start-up run length {diffs.mean():.2f} (SE {se:.2f})"
    )
    assert diffs.min() >= 0
    assert diffs.mean() > 4 * se


# ------------------------------------------------------------------------------------------
# Tabular CUSUM, k = 0.5: Montgomery's CUSUM ARL table (from memory):
# h = 4: ARL0 168, ARL 8.38 at one sigma; h = 5: ARL0 465, ARL 10.4 at one sigma.
# ------------------------------------------------------------------------------------------

CUSUM_TABLE = [(4.0, 0.0, 168.0), (4.0, 1.0, 8.38), (5.0, 0.0, 465.0), (5.0, 1.0, 10.4)]


def siegmund_one_sided(k: float, h: float, shift: float) -> float:
    """Siegmund's (1985) approximation for the upper one-sided CUSUM, as given by Montgomery:
    ARL = (exp(-2 D b) + 2 D b - 1) / (2 D^2) with D = shift - k and b = h + 1.166."""
    d, b = shift - k, h + 1.166
    return b * b if d == 0 else (math.exp(-2 * d * b) + 2 * d * b - 1) / (2 * d * d)


def cusum_markov_one_sided(k: float, h: float, shift: float, states: int = 300) -> float:
    """Zero-state ARL of the upper one-sided CUSUM by Brook & Evans (1972): state j stands for
    C+ near j*w, with w chosen so that the last cell ends at h; state 0 also holds C+ = 0."""
    w = 2 * h / (2 * states - 1)
    j = np.arange(states)
    start = j[:, None] * w - k + shift
    upper = (j[None, :] + 0.5) * w
    lower = np.where(j[None, :] == 0, -np.inf, (j[None, :] - 0.5) * w)
    inside = norm.cdf(upper - start) - norm.cdf(lower - start)
    return float(np.linalg.solve(np.eye(states) - inside, np.ones(states))[0])


def two_sided(arl_upper: float, arl_lower: float) -> float:
    # 1/ARL = 1/ARL+ + 1/ARL- (Montgomery, two-sided tabular CUSUM).
    return 1 / (1 / arl_upper + 1 / arl_lower)


@pytest.mark.parametrize(("h", "shift", "published"), CUSUM_TABLE)
def test_cusum_table_values_by_markov_chain_and_siegmund(h, shift, published):
    markov = two_sided(
        cusum_markov_one_sided(0.5, h, shift), cusum_markov_one_sided(0.5, h, -shift)
    )
    siegmund = two_sided(siegmund_one_sided(0.5, h, shift), siegmund_one_sided(0.5, h, -shift))
    print(
        f"CUSUM h={h} shift={shift}: Markov {markov:.2f}, Siegmund {siegmund:.2f}, ref {published}"
    )
    assert markov == pytest.approx(published, rel=0.01)
    assert siegmund == pytest.approx(published, rel=0.02)  # an approximation, good to ~1% here


@pytest.mark.parametrize(
    ("h", "shift", "published", "runs", "seed"),
    [
        pytest.param(4.0, 0.0, 168.0, RUNS, 8, marks=pytest.mark.slow),  # in control: long runs
        (4.0, 1.0, 8.38, RUNS, 9),
        pytest.param(5.0, 0.0, 465.0, RUNS, 10, marks=pytest.mark.slow),
        (5.0, 1.0, 10.4, RUNS, 11),
    ],
)
def test_cusum_run_lengths_match_the_table(h, shift, published, runs, seed):
    lengths = simulate(f"cusum(h={h})", shift, runs, seed)
    check_arl(f"CUSUM k=0.5 h={h}, shift {shift}", lengths, published)


def test_cusum_one_sided_arl_matches_siegmund():
    # With a one-sigma upward shift the lower sum practically never signals (its ARL exceeds
    # 10^6), so the two-sided detector runs as the upper one-sided CUSUM.
    published = siegmund_one_sided(0.5, 5.0, 1.0)
    assert siegmund_one_sided(0.5, 5.0, -1.0) > 1e6
    lengths = simulate("cusum(h=5)", 1.0, RUNS, seed=12)
    check_arl("CUSUM k=0.5 h=5, shift 1, vs Siegmund", lengths, published)
