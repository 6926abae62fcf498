"""Run lengths from :mod:`limitwatch.stats.arl` against published tables, independent numerical
computations (scipy) and simulation through the real detectors and the real engine.

Every reference value names its source; values quoted from memory say so. Simulation checks
use four standard errors of the simulated mean, computed from the simulated runs themselves.
Run ``pytest -s`` to see the numbers side by side.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import norm

from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.model import Reading
from limitwatch.stats import arl as arl_module
from limitwatch.stats.arl import ArlError, RunLength, run_length, simulate_run_lengths
from limitwatch.stats.arl import api as arl_api
from limitwatch.stats.baseline import Baseline
from limitwatch.stats.constants import MR_UCL_SIGMA
from limitwatch.stats.rules import build_detectors, parse_rules

WE_1_TO_4 = "beyond-limits, two-of-three-zone-a, four-of-five-zone-b, run-one-side"


def agree(label: str, exact: RunLength, simulated: RunLength) -> None:
    print(
        f"{label}: exact {exact.arl:.3f} (SD {exact.sd:.2f}), simulated {simulated.arl:.3f} "
        f"(SE {simulated.standard_error:.3f}, SD {simulated.sd:.2f}, {simulated.runs} runs)"
    )
    assert exact.method == "exact" and simulated.method == "simulated"
    assert abs(exact.arl - simulated.arl) < 4 * simulated.standard_error
    # The sample SD of a (nearly) geometric run length has a relative error of about
    # sqrt(2 / runs); allow four of them.
    assert simulated.sd == pytest.approx(exact.sd, rel=4 * math.sqrt(2 / simulated.runs))


# ------------------------------------------------------------------------------------------
# Shewhart limits alone: the run length is geometric with p = P(|Z + d| > 3) (scipy.stats.norm)
# ------------------------------------------------------------------------------------------


@pytest.mark.parametrize("shift", [0.0, 0.5, 1.0, 2.0, 3.0])
def test_three_sigma_limits_alone_match_the_geometric_law(shift):
    # Montgomery, Introduction to SQC: ARL = 1/p, and the SD of a geometric run is sqrt(1-p)/p.
    p = norm.sf(3.0 - shift) + norm.cdf(-3.0 - shift)
    r = run_length("beyond-limits", shift)
    assert r.method == "exact"
    assert r.arl == pytest.approx(1.0 / p, rel=1e-9)
    assert r.sd == pytest.approx(math.sqrt(1.0 - p) / p, rel=1e-9)
    if shift == 0.0:
        assert r.arl == pytest.approx(1.0 / (2.0 * norm.sf(3.0)), rel=1e-9)  # 370.4


# ------------------------------------------------------------------------------------------
# Western Electric rules: Champ, C. W. & Woodall, W. H. (1987), Technometrics 29(4), 393-399,
# zero-state in-control ARLs (from memory).
# ------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("rules", "published"),
    [
        ("beyond-limits", 370.40),
        ("beyond-limits, two-of-three-zone-a", 225.44),
        ("beyond-limits, four-of-five-zone-b", 166.05),
        ("beyond-limits, run-one-side", 152.73),
        ("beyond-limits, two-of-three-zone-a, four-of-five-zone-b", 132.89),
        ("beyond-limits, two-of-three-zone-a, run-one-side", 122.05),
        (WE_1_TO_4, 91.75),
    ],
)
def test_western_electric_combinations_match_champ_and_woodall(rules, published):
    r = run_length(rules)
    print(f"{rules}: {r.arl:.3f} (published {published}), {r.states} states")
    assert r.method == "exact"
    assert r.arl == pytest.approx(published, abs=0.006)


def test_rule_order_and_repeats_do_not_change_the_answer():
    a = run_length(WE_1_TO_4, 1.0)
    b = run_length("run-one-side, four-of-five-zone-b, beyond-limits, two-of-three-zone-a", 1.0)
    assert a == b


# ------------------------------------------------------------------------------------------
# The moving-range rule: collocation over the previous reading, checked against an independent
# fine-grid Markov chain on the previous reading (scipy), with Richardson extrapolation.
# ------------------------------------------------------------------------------------------


def xmr_grid_arl(shift: float, cells: int) -> float:
    """ARL of ``beyond-limits`` + ``mr-beyond-limit``: state = cell of the previous reading
    in [-3, 3]; the first reading has no moving range."""
    c = MR_UCL_SIGMA
    edges = np.linspace(-3.0, 3.0, cells + 1)
    mids = (edges[:-1] + edges[1:]) / 2
    lo = np.maximum(edges[None, :-1], mids[:, None] - c)
    hi = np.minimum(edges[None, 1:], mids[:, None] + c)
    q = np.where(hi > lo, norm.cdf(hi - shift) - norm.cdf(lo - shift), 0.0)
    m1 = np.linalg.solve(np.eye(cells) - q, np.ones(cells))
    first = norm.cdf(edges[1:] - shift) - norm.cdf(edges[:-1] - shift)
    return 1.0 + float(first @ m1)


@pytest.mark.parametrize("shift", [0.0, 1.0, 2.0])
def test_moving_range_rule_matches_a_fine_grid_chain(shift):
    coarse, fine = xmr_grid_arl(shift, 300), xmr_grid_arl(shift, 600)
    reference = (4 * fine - coarse) / 3  # the midpoint error falls as the square of the cell
    ours = run_length("limits", shift)
    print(f"limits, shift {shift}: ours {ours.arl:.5f}, grid {reference:.5f}")
    assert ours.method == "exact"
    assert ours.arl == pytest.approx(reference, rel=2e-5)


def test_moving_range_chain_is_converged():
    coarse = run_length("western-electric", 1.0)
    finer = run_length("western-electric", 1.0, resolution=2)
    assert finer.states > coarse.states
    assert coarse.arl == pytest.approx(finer.arl, rel=1e-6)
    assert coarse.sd == pytest.approx(finer.sd, rel=1e-6)


# ------------------------------------------------------------------------------------------
# EWMA: Lucas & Saccucci (1990), Technometrics 32(1), as tabled in Montgomery (from memory):
# lambda 0.10, L 2.814 and lambda 0.20, L 2.962 give ARL0 ~ 500; at one sigma 10.3 and 10.5.
# The tables use asymptotic limits (exact_startup=false); the detector's default uses the exact
# start-up limits, checked separately below by simulating the real detector.
# ------------------------------------------------------------------------------------------


def ewma_grid_arl(lam: float, big_l: float, shift: float, states: int) -> float:
    """Brook & Evans (1972) for the EWMA with asymptotic limits, via scipy."""
    half = big_l * math.sqrt(lam / (2 - lam))
    width = 2 * half / states
    mid = -half + (np.arange(states) + 0.5) * width
    base = (1 - lam) * mid[:, None]
    upper = (mid[None, :] + width / 2 - base) / lam - shift
    lower = (mid[None, :] - width / 2 - base) / lam - shift
    m1 = np.linalg.solve(np.eye(states) - (norm.cdf(upper) - norm.cdf(lower)), np.ones(states))
    return float(m1[states // 2])


@pytest.mark.parametrize(
    ("lam", "big_l", "shift", "published", "tol"),
    [
        (0.10, 2.814, 0.0, 500.0, 5.0),
        (0.10, 2.814, 1.0, 10.3, 0.05),
        (0.20, 2.962, 0.0, 500.0, 5.0),
        (0.20, 2.962, 1.0, 10.5, 0.05),
    ],
)
def test_ewma_with_asymptotic_limits_matches_lucas_and_saccucci(lam, big_l, shift, published, tol):
    ours = run_length(f"ewma(lam={lam}, L={big_l}, exact_startup=false)", shift)
    grid = ewma_grid_arl(lam, big_l, shift, 801)
    print(f"EWMA {lam}/{big_l} shift {shift}: ours {ours.arl:.3f}, grid {grid:.3f}, {published}")
    assert ours.method == "exact"
    assert abs(ours.arl - published) < tol
    assert ours.arl == pytest.approx(grid, rel=2e-4)


def test_ewma_exact_start_up_limits_as_the_detector_uses_them():
    # Lucas & Saccucci (1990): narrower limits at the start catch a shift present from the
    # start sooner and cost a little in-control ARL. The detector's default has them on.
    (det,) = build_detectors(parse_rules("ewma(lam=0.1, L=2.814)"))
    assert det.exact_startup
    startup = {d: run_length("ewma(lam=0.1, L=2.814)", d) for d in (0.0, 1.0)}
    asymptotic = {d: run_length("ewma(lam=0.1, L=2.814, exact_startup=false)", d) for d in (0, 1)}
    assert startup[1.0].arl < asymptotic[1].arl - 1.0
    assert asymptotic[0].arl - 30 < startup[0.0].arl < asymptotic[0].arl
    simulated = run_length("ewma(lam=0.1, L=2.814)", 1.0, method="simulate")
    agree("EWMA 0.1/2.814 exact start-up, shift 1", startup[1.0], simulated)
    simulated0 = run_length("ewma(lam=0.1, L=2.814)", 0.0, method="simulate", rel_error=0.02)
    agree("EWMA 0.1/2.814 exact start-up, in control", startup[0.0], simulated0)


# ------------------------------------------------------------------------------------------
# Tabular CUSUM, k = 0.5: Montgomery's two-sided CUSUM ARL table (from memory): h = 4: ARL0
# 168, 8.38 at one sigma; h = 5: 465 and 10.4. Siegmund's (1985) approximation as given by
# Montgomery; and the one-sided Brook & Evans chains combined by 1/ARL = 1/ARL+ + 1/ARL-
# (Montgomery), which our two-dimensional chain must reproduce when there is no head start.
# ------------------------------------------------------------------------------------------


def siegmund_one_sided(k: float, h: float, shift: float) -> float:
    d, b = shift - k, h + 1.166
    return b * b if d == 0 else (math.exp(-2 * d * b) + 2 * d * b - 1) / (2 * d * d)


def cusum_one_sided(k: float, h: float, shift: float, states: int) -> float:
    w = 2 * h / (2 * states - 1)
    j = np.arange(states)
    start = j[:, None] * w - k + shift
    upper = (j[None, :] + 0.5) * w
    lower = np.where(j[None, :] == 0, -np.inf, (j[None, :] - 0.5) * w)
    q = norm.cdf(upper - start) - norm.cdf(lower - start)
    return float(np.linalg.solve(np.eye(states) - q, np.ones(states))[0])


def two_sided(up: float, down: float) -> float:
    return 1 / (1 / up + 1 / down)


@pytest.mark.parametrize(
    ("h", "shift", "published"),
    [(4.0, 0.0, 168.0), (4.0, 1.0, 8.38), (5.0, 0.0, 465.0), (5.0, 1.0, 10.4)],
)
def test_cusum_matches_the_table_siegmund_and_one_sided_chains(h, shift, published):
    ours = run_length(f"cusum(k=0.5, h={h})", shift)
    siegmund = two_sided(siegmund_one_sided(0.5, h, shift), siegmund_one_sided(0.5, h, -shift))
    one_sided = [
        two_sided(cusum_one_sided(0.5, h, shift, n), cusum_one_sided(0.5, h, -shift, n))
        for n in (200, 400)
    ]
    combined = (one_sided[1] * 799**2 - one_sided[0] * 399**2) / (799**2 - 399**2)
    print(
        f"CUSUM h={h} shift {shift}: ours {ours.arl:.3f}, one-sided chains {combined:.3f}, "
        f"Siegmund {siegmund:.3f}, table {published}"
    )
    assert ours.method == "exact"
    assert ours.arl == pytest.approx(published, rel=0.005)
    assert ours.arl == pytest.approx(siegmund, rel=0.02)
    assert ours.arl == pytest.approx(combined, rel=1e-4)


@pytest.mark.parametrize(("shift", "published"), [(0.0, 430.0), (1.0, 6.35)])
def test_cusum_head_start_matches_lucas_and_crosier(shift, published):
    # Lucas & Crosier (1982), Technometrics 24(3): k 0.5, h 5, head start h/2 (from memory).
    ours = run_length("cusum(k=0.5, h=5, headstart=2.5)", shift)
    assert ours.arl == pytest.approx(published, rel=0.005)


def test_cusum_with_head_start_and_limits_agrees_with_simulation():
    selection = "beyond-limits, cusum(k=0.5, h=5, headstart=2.5)"
    agree(
        "beyond-limits + FIR CUSUM, shift 0.5",
        run_length(selection, 0.5),
        run_length(selection, 0.5, method="simulate"),
    )


# ------------------------------------------------------------------------------------------
# Exact chains against simulation through the real detectors
# ------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("selection", "shift"),
    [
        ("western-electric", 0.0),
        ("western-electric", 1.5),
        ("beyond-limits, run-one-side(length=9), hugging-center, avoiding-center", 0.5),
        ("beyond-limits, ewma(lam=0.2, L=2.962)", 1.0),
    ],
)
def test_exact_chain_agrees_with_simulation_of_the_real_detectors(selection, shift):
    exact = run_length(selection, shift)
    simulated = run_length(selection, shift, method="simulate")
    agree(f"{selection}, shift {shift}", exact, simulated)


def test_simulation_runs_exactly_as_the_engine_does():
    # Same readings through StreamMonitor (known baseline: center 0, sigma 1) and through the
    # simulator: identical run lengths, moving-range rule included.
    specs = parse_rules("nelson")
    rng = np.random.default_rng(5)
    values = (rng.standard_normal(6000) + 0.5).tolist()
    simulated = simulate_run_lengths(
        specs, 0.0, seed=0, readings=values, rel_error=1e-9, max_runs=10**6
    )
    baseline = Baseline.from_limits(center=0.0, sigma=1.0)
    engine_lengths = []
    monitor = None
    for t, value in enumerate(values):
        if monitor is None:
            monitor = StreamMonitor("s", MonitorSettings(rules="nelson"), baseline)
            start = t
        if monitor.update(Reading("s", float(t), value)).signals:
            engine_lengths.append(t - start + 1)
            monitor = None
    assert len(engine_lengths) > 100
    assert simulated.tolist() == engine_lengths


# ------------------------------------------------------------------------------------------
# Start-up convention: zero state (windows empty) against steady state
# ------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "rules", ["beyond-limits, two-of-three-zone-a", "beyond-limits, four-of-five-zone-b"]
)
@pytest.mark.parametrize("shift", [1.0, 2.0, 3.0])
def test_start_up_convention_moves_the_shifted_arl_in_the_second_decimal(rules, shift):
    zero = run_length(rules, shift).arl
    steady = run_length(rules, shift, start="steady").arl
    print(f"{rules}, shift {shift}: zero state {zero:.4f}, steady state {steady:.4f}")
    assert round(zero, 2) != round(steady, 2)
    assert abs(zero - steady) >= 0.01
    assert abs(zero - steady) < 0.1 * zero  # a start-up effect, not a different chart


def test_limits_alone_have_no_start_up_effect():
    assert run_length("beyond-limits", 1.0, start="steady").arl == pytest.approx(
        run_length("beyond-limits", 1.0).arl, rel=1e-12
    )


def test_steady_state_arl_matches_simulation_after_an_in_control_burn_in():
    # The shift arrives after 60 in-control readings without a signal (runs that signal during
    # the burn-in are dropped: the steady state is conditional on no false alarm).
    specs = parse_rules(WE_1_TO_4)
    rng = np.random.default_rng(21)
    lengths = []
    while len(lengths) < 4000:
        updates = [d.update for d in build_detectors(specs)]
        burn = rng.standard_normal(60).tolist()
        if any(u(i, z) is not None for i, z in enumerate(burn) for u in updates):
            continue
        n = 0
        while True:
            z = rng.standard_normal() + 1.0
            n += 1
            if any(u(59 + n, z) is not None for u in updates):
                break
        lengths.append(n)
    arr = np.array(lengths, dtype=float)
    se = arr.std(ddof=1) / math.sqrt(arr.size)
    steady = run_length(WE_1_TO_4, 1.0, start="steady").arl
    zero = run_length(WE_1_TO_4, 1.0).arl
    print(f"WE 1-4 shift 1: simulated {arr.mean():.3f} (SE {se:.3f}), steady {steady:.3f}")
    assert abs(arr.mean() - steady) < 4 * se
    assert abs(arr.mean() - zero) > 4 * se


def test_steady_start_is_refused_for_simulated_selections():
    with pytest.raises(ArlError, match="steady-state"):
        run_length("limits, trend", 1.0, start="steady")


# ------------------------------------------------------------------------------------------
# Methods, errors and the cache
# ------------------------------------------------------------------------------------------


def test_selections_without_a_chain_are_simulated_with_their_error():
    r = run_length("limits, trend", 2.0)
    assert r.method == "simulated" and r.runs >= 400
    assert r.standard_error <= 0.01 * r.arl + 1e-12 or r.runs == 40_000
    with pytest.raises(ArlError, match="order of successive values"):
        run_length("trend", 2.0, method="exact")
    assert arl_module.exact_kind(parse_rules("western-electric")) == "zone+mr"
    assert arl_module.exact_kind(parse_rules("mr-beyond-limit")) is None


@pytest.mark.parametrize(
    "kwargs", [{"start": "later"}, {"method": "guess"}, {"resolution": 0}, {"rel_error": 0.0}]
)
def test_bad_arguments_are_refused(kwargs):
    with pytest.raises(ArlError):
        run_length("limits", 0.0, **kwargs)


def test_cache_export_and_import_round_trip(monkeypatch):
    selection = "beyond-limits, hugging-center(length=12)"
    first = run_length(selection, 0.25)
    saved = arl_module.cache_export()
    arl_module.cache_clear()

    def no_compute(*_args, **_kwargs):
        raise AssertionError("recomputed instead of using the imported result")

    monkeypatch.setattr(arl_api, "_exact", no_compute)  # where the cache looks it up
    other = {k.replace("v1|", "v0|", 1): v for k, v in saved.items()}
    assert arl_module.cache_import({**other, "junk": 3}) == 0
    assert arl_module.cache_import(saved) == len(saved)
    assert run_length(selection, 0.25) == first
