"""AR(1) residual charts for autocorrelated readings: the fit against statsmodels, the residual
limits against a plain computation, incremental against batch residuals, and ``baseline fit`` /
``replay`` with ``--ar1-residuals`` through the installed console script.

The series are invented: seeded AR(1) (and one AR(2)) processes, "a tank level" or "a slowly
wandering bearing temperature" of a plant that does not exist.

References named beside each check:
* statsmodels.tsa.ar_model.AutoReg(x, lags=1, trend="c") -- the conditional least-squares
  AR(1) fit this module promises to reproduce (phi, intercept, residuals, residual variance).
* Montgomery, Introduction to Statistical Quality Control, Appendix VI (n = 2): d2 = 1.128,
  E2 = 3/d2 = 2.660, D4 = 3.267 for the residuals' XmR limits.
* Box, Jenkins & Reinsel, Time Series Analysis: the autocorrelations of an AR(2) process
  from the Yule-Walker equations (rho1 = a1 / (1 - a2), rho2 = a1 rho1 + a2).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.tsa.ar_model import AutoReg

from limitwatch.stats.autocorrelation import (
    ESTIMATOR,
    Ar1Error,
    ResidualFilter,
    fit_ar1,
    one_step_residuals,
)
from limitwatch.stats.baseline import BaselineError, fit_baseline
from tests.helpers import cli, examples, write_csv

TABLE_E2, TABLE_D4 = 2.660, 3.267  # Montgomery, Appendix VI, n = 2 (three decimals printed)
TABLE_REL = 1.5e-3


def ar1_series(n: int, phi: float, seed: int, *, mean: float = 0.0, sd: float = 1.0):
    """x_t - mean = phi (x_(t-1) - mean) + e_t with e_t ~ N(0, sd^2), started in its stationary
    distribution."""
    rng = np.random.default_rng(seed)
    x = np.empty(n)
    x[0] = rng.normal(0.0, sd / math.sqrt(1.0 - phi * phi))
    for t in range(1, n):
        x[t] = phi * x[t - 1] + rng.normal(0.0, sd)
    return x + mean


# --------------------------------------------------------------------------- the fit


@pytest.mark.parametrize(("phi", "seed"), [(0.8, 1), (0.95, 2), (0.3, 3), (-0.6, 4)])
def test_phi_and_mu_match_statsmodels_autoreg(phi: float, seed: int) -> None:
    x = ar1_series(400, phi, seed, mean=61.5, sd=0.4)
    fit = fit_ar1(x)
    # statsmodels.tsa.ar_model.AutoReg(lags=1, trend="c"): conditional least squares
    ref = AutoReg(x, lags=1, trend="c").fit()
    const, phi_ref = ref.params
    assert fit.phi == pytest.approx(phi_ref, rel=1e-9, abs=1e-12)
    assert fit.mu == pytest.approx(const / (1.0 - phi_ref), rel=1e-9)
    assert fit.intercept == pytest.approx(const, rel=1e-7)
    # its residuals are ours from the second reading on ...
    np.testing.assert_allclose(fit.residuals[1:], ref.resid, rtol=1e-7, atol=1e-10)
    # ... and its sigma2 is SSR / nobs; ours divides by nobs - 2 (the regression's dof)
    assert fit.innovation_sd == pytest.approx(
        math.sqrt(ref.sigma2 * ref.nobs / (ref.nobs - 2)), rel=1e-9
    )
    assert fit.n == 400 and len(fit.residuals) == 400
    # and the estimate lands near the simulated phi (400 readings: SE about 0.05)
    assert abs(fit.phi - phi) < 0.15


def test_a_large_offset_with_a_tiny_spread_loses_nothing() -> None:
    # readings near 1e6 varying in the sixth decimal: float64 keeps about four digits of the
    # variation, and the fit must not lose them to the offset
    x = 1e6 + ar1_series(300, 0.7, 9, sd=1e-6)
    offsets = x - 1e6  # exact subtraction of the stored readings (Sterbenz)
    ref = AutoReg(offsets, lags=1, trend="c").fit()  # statsmodels on the exact offsets
    fit = fit_ar1(x)
    assert fit.phi == pytest.approx(ref.params[1], rel=1e-9)
    # mu itself is a float near 1e6: good to its spacing there, 2**-33 = 1.2e-10
    assert fit.mu - 1e6 == pytest.approx(ref.params[0] / (1 - ref.params[1]), abs=2.4e-10)
    np.testing.assert_allclose(fit.residuals[1:], ref.resid, rtol=1e-6, atol=1e-15)


def test_the_first_residual_is_scaled_to_the_innovation_variance() -> None:
    x = ar1_series(60, 0.6, 5, mean=20.0)
    fit = fit_ar1(x)
    # Prais & Winsten (1954): sqrt(1 - phi^2) (x_1 - mu) has the variance of the innovations
    assert fit.residuals[0] == pytest.approx(math.sqrt(1 - fit.phi**2) * (x[0] - fit.mu))
    plain = x[1:] - fit.mu - fit.phi * (x[:-1] - fit.mu)  # e_t written out
    np.testing.assert_allclose(fit.residuals[1:], plain, rtol=1e-9, atol=1e-12)


def test_residual_limits_match_a_plain_xmr_computation() -> None:
    x = ar1_series(250, 0.85, 17, mean=3.2, sd=0.05)
    fit = fit_ar1(x)
    e = np.array(fit.residuals)
    mr_bar = float(np.mean(np.abs(np.diff(e))))
    b = fit.baseline
    assert b.n == 250 and b.excluded == ()
    assert b.center == pytest.approx(float(np.mean(e)), abs=1e-12)
    assert b.mr_bar == pytest.approx(mr_bar, rel=1e-12)
    # Montgomery, Appendix VI: UCL/LCL = center +- 2.660 MRbar, MR UCL = 3.267 MRbar
    assert b.ucl == pytest.approx(b.center + TABLE_E2 * mr_bar, rel=TABLE_REL)
    assert b.lcl == pytest.approx(b.center - TABLE_E2 * mr_bar, rel=TABLE_REL)
    assert b.mr_ucl == pytest.approx(TABLE_D4 * mr_bar, rel=TABLE_REL)
    # the residuals are close to independent: the readings' lag-1 autocorrelation is not
    assert fit.lag1_autocorrelation > 0.7 and abs(b.lag1_autocorrelation) < 0.2
    # and the plain fit of the readings is far tighter than their real spread
    plain = fit_baseline(x)
    assert plain.sigma < 0.7 * float(np.std(x, ddof=1))


def test_residual_exclusions_point_at_the_readings() -> None:
    x = ar1_series(120, 0.5, 23, mean=40.0)
    x[70] += 12.0  # a lone wild reading: a large residual at 70, an opposite one at 71
    fit = fit_ar1(x, exclude_beyond=True)
    first_round = {e.position for e in fit.baseline.exclusions if e.iteration == 1}
    assert first_round == {70, 71}


@settings(max_examples=examples(60), deadline=None)
@given(
    values=st.lists(
        st.floats(min_value=-1e4, max_value=1e4, allow_nan=False), min_size=1, max_size=60
    ),
    phi=st.floats(min_value=-0.99, max_value=0.99),
    mu=st.floats(min_value=-1e4, max_value=1e4),
)
def test_incremental_residuals_equal_the_batch(values: list[float], phi: float, mu: float) -> None:
    f = ResidualFilter(phi, mu)
    one_by_one = [f.update(v) for v in values]
    np.testing.assert_allclose(one_by_one, one_step_residuals(values, phi, mu), rtol=1e-12)


def test_peek_does_not_move_the_filter() -> None:
    f = ResidualFilter(0.5, 10.0)
    f.update(12.0)
    assert f.peek(99.0) == pytest.approx(99.0 - 10.0 - 0.5 * 2.0)
    assert f.update(13.0) == pytest.approx(2.0)  # still judged against 12.0


def test_residuals_of_an_ar2_process_stay_autocorrelated_and_say_so() -> None:
    # AR(2) with a1 = 1.2, a2 = -0.5. Box, Jenkins & Reinsel (Yule-Walker): rho1 = 1.2/1.5 = 0.8,
    # rho2 = 1.2*0.8 - 0.5 = 0.46; the AR(1) residual e_t = x_t - 0.8 x_(t-1) then has lag-1
    # autocorrelation (rho1 - 0.8 rho2 - 0.8 + 0.64 rho1) / (1.64 - 1.6 rho1) = 0.144/0.36 = 0.4.
    rng = np.random.default_rng(5)
    x = np.zeros(4000)
    for t in range(2, x.size):
        x[t] = 1.2 * x[t - 1] - 0.5 * x[t - 2] + rng.normal()
    fit = fit_ar1(x)
    assert fit.phi == pytest.approx(0.8, abs=0.03)
    assert fit.baseline.lag1_autocorrelation == pytest.approx(0.4, abs=0.05)
    assert any("still autocorrelated" in w for w in fit.warnings)


def test_a_phi_near_one_warns_that_shifts_show_mostly_at_onset() -> None:
    fit = fit_ar1(ar1_series(600, 0.95, 8))
    assert fit.phi >= 0.9
    assert any("first reading" in w for w in fit.warnings)
    assert not any("first reading" in w for w in fit_ar1(ar1_series(600, 0.4, 8)).warnings)


def test_unusable_readings_are_refused_with_reasons() -> None:
    growth = 1.05 ** np.arange(80) + np.random.default_rng(4).normal(0.0, 0.1, 80)
    with pytest.raises(Ar1Error, match="not between -1 and 1"):  # explosive: phi about 1.05
        fit_ar1(growth)
    # least squares gives a drifting walk a phi just below 1 (Dickey & Fuller 1979): refused
    # because its mean lands outside the readings
    walk = np.cumsum(np.random.default_rng(1).normal(size=100)) + np.arange(100) * 0.5
    assert AutoReg(walk, lags=1, trend="c").fit().params[1] < 1.0  # statsmodels agrees
    with pytest.raises(Ar1Error, match="outside the readings"):
        fit_ar1(walk)
    with pytest.raises(Ar1Error, match="do not vary"):
        fit_ar1([5.0] * 30)
    with pytest.raises(Ar1Error, match="fewer"):
        fit_ar1([1.0, 2.0, 1.5], min_points=10)
    with pytest.raises(Ar1Error, match="position 4"):
        fit_ar1([1.0, 2.0, 1.5, 1.2, math.nan, 1.1] * 3, min_points=5)
    with pytest.raises(BaselineError):  # an Ar1Error is a BaselineError for callers
        ResidualFilter(1.0, 0.0)


def test_the_baseline_warning_points_at_the_residual_option() -> None:
    b = fit_baseline(ar1_series(300, 0.8, 12, mean=70.0))
    (warning,) = [w for w in b.warnings if "autocorrelation" in w]
    assert "--ar1-residuals" in warning and "too tight" in warning


# --------------------------------------------------------------------------- the commands


def test_baseline_fit_reports_phi_and_residual_limits(tmp_path) -> None:
    x = np.round(ar1_series(300, 0.85, 31, mean=74.0, sd=0.3), 4)
    path = write_csv(tmp_path / "bearing.csv", ["t", "temp"], [[i, v] for i, v in enumerate(x)])
    result = cli(
        "baseline", "fit", str(path), "--value", "temp", "--ar1-residuals", "--format", "json"
    )
    assert result.returncode == 0, result.stderr
    data = json.loads(result.stdout)
    ar1 = data["ar1"]
    ref = AutoReg(x, lags=1, trend="c").fit()  # statsmodels AutoReg, conditional LS
    assert ar1["estimator"] == ESTIMATOR == "conditional least squares"
    assert ar1["phi"] == pytest.approx(ref.params[1], rel=1e-9)
    assert ar1["mu"] == pytest.approx(ref.params[0] / (1 - ref.params[1]), rel=1e-9)
    e = np.concatenate([[math.sqrt(1 - ar1["phi"] ** 2) * (x[0] - ar1["mu"])], ref.resid])
    mr_bar = float(np.mean(np.abs(np.diff(e))))
    res = ar1["residual_baseline"]
    assert res["mr_bar"] == pytest.approx(mr_bar, rel=1e-9)
    assert res["ucl"] == pytest.approx(float(np.mean(e)) + TABLE_E2 * mr_bar, rel=TABLE_REL)
    # the plain fit is there too, unchanged, with its own (much tighter) limits
    assert data["center"] == pytest.approx(float(np.mean(x)))
    # ... about sqrt(1 - phi) = 0.39 of the readings' real three-sigma spread, which is
    # 3 sd_e / sqrt(1 - phi^2) for an AR(1) process (sd_e from the residual limits)
    real_half_width = (res["ucl"] - res["center"]) / math.sqrt(1 - ar1["phi"] ** 2)
    assert data["ucl"] - data["center"] < 0.6 * real_half_width

    text = cli("baseline", "fit", str(path), "--value", "temp", "--ar1-residuals")
    assert text.returncode == 0, text.stderr
    assert "AR(1) model" in text.stdout and "phi" in text.stdout
    assert "one-step-ahead residuals" in text.stdout
    assert "--ar1-residuals" in text.stdout  # the plain fit's autocorrelation warning
    assert max(len(line) for line in text.stdout.splitlines()) <= 80


def test_baseline_fit_refuses_a_random_walk(tmp_path) -> None:
    walk = np.cumsum(np.random.default_rng(6).normal(size=100)) + np.arange(100)
    path = write_csv(tmp_path / "w.csv", ["v"], [[round(float(v), 4)] for v in walk])
    result = cli("baseline", "fit", str(path), "--value", "v", "--ar1-residuals")
    assert result.returncode == 1 and "random walk" in result.stderr
    assert "Traceback" not in result.stderr


def _replay(path, *extra: str) -> list[dict]:
    result = cli(
        "replay",
        str(path),
        "--value",
        "level",
        "--time",
        "t",
        "--baseline-first",
        "200",
        "--format",
        "jsonl",
        *extra,
    )
    assert result.returncode == 0, result.stderr
    return [json.loads(line) for line in result.stdout.splitlines()]


@pytest.fixture
def tank(tmp_path):
    """An in-control, strongly autocorrelated tank level: phi 0.9, 1,200 readings a minute
    apart; every signal on it is a false alarm."""
    x = np.round(ar1_series(1200, 0.9, 2024, mean=5.0, sd=0.02), 5)
    return write_csv(tmp_path / "tank.csv", ["t", "level"], [[60 * i, v] for i, v in enumerate(x)])


def test_residuals_raise_far_fewer_false_alarms(tank) -> None:
    raw = _replay(tank)
    residual = _replay(tank, "--ar1-residuals")
    # Independent readings under the Western Electric rules give roughly one false alarm in
    # 60-90 readings (Champ & Woodall 1987: ARL0 91.75 for rules 1-4, from memory), so about
    # 10-20 over the 1,000 monitored; the raw chart's too-tight limits give far more.
    assert len(raw) >= 3 * max(len(residual), 1)
    assert len(residual) <= 40
    assert all("reading" in r for r in residual) and all("reading" not in r for r in raw)


def test_replay_residual_limits_are_the_fit_of_the_same_readings(tank, tmp_path) -> None:
    fit = cli(
        "baseline", "fit", str(tank), "--value", "level", "--first", "200", "--ar1-residuals",
        "--format", "json",
    )  # fmt: skip
    res = json.loads(fit.stdout)["ar1"]["residual_baseline"]
    signals = _replay(tank, "--ar1-residuals")
    assert signals  # a few false alarms carry the limits in force
    for s in signals:
        assert s["ucl"] == pytest.approx(res["ucl"], rel=1e-12)
        assert s["center"] == pytest.approx(res["center"], abs=1e-12)


def test_a_real_shift_is_still_seen_on_the_residuals(tmp_path) -> None:
    sd = 0.02
    x = ar1_series(700, 0.9, 77, mean=5.0, sd=sd)
    x[500:] += 6 * sd  # the level steps up by six innovation sigmas at reading 500 and stays
    path = write_csv(
        tmp_path / "tank.csv", ["t", "level"], [[60 * i, round(v, 5)] for i, v in enumerate(x)]
    )
    signals = _replay(path, "--ar1-residuals")
    # e_500 = 6 sd + noise: beyond three-sigma limits unless the noise is below -3 sd
    onset = [s for s in signals if 500 <= s["index"] <= 502 and s["rule"] == "beyond-limits"]
    assert onset and onset[0]["side"] == "upper"
    assert onset[0]["reading"] == pytest.approx(x[onset[0]["index"]], abs=1e-5)
    # what persists, (1 - phi) 6 sd = 0.6 sd, is left to the run tests, which need longer
    later = [s for s in signals if 503 <= s["index"] < 600 and s["rule"] == "run-one-side"]
    assert later and all(s["side"] == "upper" for s in later)


def test_replay_table_names_the_model_and_keeps_bounds_on_the_readings(tmp_path) -> None:
    x = np.round(ar1_series(300, 0.8, 41, mean=3.0, sd=0.2), 4)
    x[250] = -0.5  # below the natural bound of a level (the others are 2.5 sd above it)
    path = write_csv(tmp_path / "tank.csv", ["t", "level"], [[i, v] for i, v in enumerate(x)])
    result = cli(
        "replay", str(path), "--value", "level", "--time", "t", "--baseline-first", "100",
        "--lower-bound", "0", "--ar1-residuals",
    )  # fmt: skip
    assert result.returncode == 0, result.stderr
    assert "AR(1) for 'default'" in result.stderr and "phi" in result.stderr
    assert "residual baseline for 'default'" in result.stderr
    refused = [line for line in result.stderr.splitlines() if line.startswith("refused:")]
    assert len(refused) == 1  # residuals below 0 are not refused, the raw reading is
    assert "line 252" in refused[0] and "reading -0.5" in refused[0]
    assert "below-lower-bound" in refused[0]
    assert "residual" in result.stdout.splitlines()[0] or "No signals" in result.stdout
    help_text = cli("replay", "--help").stdout
    assert "--ar1-residuals" in help_text and "autocorrelated" in help_text


def test_replay_refuses_the_same_rows_for_the_same_reasons(tmp_path) -> None:
    x = np.round(ar1_series(80, 0.7, 3, mean=10.0), 3)
    rows = [[i, "a", v] for i, v in enumerate(x)]
    rows.insert(42, [41, "a", x[41]])  # the same reading again: a duplicate
    rows.insert(53, [40, "a", x[40]])  # an older time: out of order
    path = write_csv(tmp_path / "r.csv", ["t", "s", "v"], rows)

    def refusals(*extra: str) -> list[str]:
        result = cli(
            "replay", str(path), "--value", "v", "--time", "t", "--stream", "s",
            "--baseline-first", "30", *extra,
        )  # fmt: skip
        assert result.returncode == 0, result.stderr
        return [line for line in result.stderr.splitlines() if line.startswith("refused:")]

    plain = refusals()
    assert len(plain) == 2 and "duplicate" in plain[0] and "out-of-order" in plain[1]
    assert refusals("--ar1-residuals") == plain  # raw readings quoted, same lines and reasons
