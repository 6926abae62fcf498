"""The false-alarm planner (:mod:`limitwatch.planner`) and ``limitwatch plan`` through the real
console script.

Reference values: three-sigma limits alone have a geometric run length, ARL = 1/p with
p = P(|Z + d| > 3) (scipy.stats.norm); Champ & Woodall (1987), Technometrics 29(4), give ARL0 =
91.75 for the Western Electric rules 1-4 (from memory).
"""

from __future__ import annotations

import json
import textwrap

import pytest
from scipy.stats import norm

from limitwatch.planner import (
    ASSUMPTIONS,
    CANDIDATES,
    PERIODS,
    SHIFTS,
    BudgetError,
    parse_budget,
    plan_stream,
    search_budget,
    site_false_alarms,
)
from limitwatch.stats import arl
from limitwatch.stats.arl import run_length
from tests.helpers import cli

SECONDS = {"day": 86_400, "week": 604_800, "month": 30 * 86_400}


def shewhart_arl(shift: float) -> float:
    return 1.0 / (norm.sf(3.0 - shift) + norm.cdf(-3.0 - shift))


# ------------------------------------------------------------------------------------------
# Plans
# ------------------------------------------------------------------------------------------


def test_false_alarms_are_readings_per_period_over_the_in_control_arl():
    p = plan_stream("beyond-limits", cadence=90.0, streams=3)
    for period, seconds in SECONDS.items():
        expected = seconds / 90.0 / shewhart_arl(0.0)
        assert p.false_alarms(period) == pytest.approx(expected, rel=1e-9)
        assert p.total_false_alarms(period) == pytest.approx(3 * expected, rel=1e-9)
    assert [d.shift for d in p.delays] == list(SHIFTS) == [1.0, 1.5, 2.0, 3.0]
    for delay in p.delays:
        assert delay.run.arl == pytest.approx(shewhart_arl(delay.shift), rel=1e-9)
        assert delay.seconds == pytest.approx(90.0 * shewhart_arl(delay.shift), rel=1e-9)


def test_western_electric_rules_at_a_reading_a_minute():
    # Champ & Woodall (1987): ARL0 91.75 for rules 1-4 (from memory); 10,080 readings a week.
    rules = "beyond-limits, two-of-three-zone-a, four-of-five-zone-b, run-one-side"
    p = plan_stream(rules, cadence=60.0)
    assert p.false_alarms("week") == pytest.approx(10_080 / 91.75, rel=1e-4)
    assert p.in_control.method == "exact"


def test_site_total_adds_every_stream_at_its_own_cadence():
    plans = [
        plan_stream("beyond-limits", cadence=60.0, streams=10),
        plan_stream("beyond-limits", cadence=8 * 3600.0, streams=4),
    ]
    site = site_false_alarms(plans)
    per_reading = 1 / shewhart_arl(0.0)
    for period, seconds in SECONDS.items():
        expected = (10 * seconds / 60.0 + 4 * seconds / 28_800.0) * per_reading
        assert site[period] == pytest.approx(expected, rel=1e-9)


def test_plan_states_its_assumptions():
    text = " ".join(ASSUMPTIONS).lower()
    for word in ("independent", "normal", "known", "autocorrelat", "renewal", "zero-state"):
        assert word in text
    assert PERIODS["month"] == 30 * 86_400


@pytest.mark.parametrize(("cadence", "streams"), [(0.0, 1), (-5.0, 1), (60.0, 0)])
def test_plan_refuses_impossible_settings(cadence, streams):
    with pytest.raises(ValueError):
        plan_stream("limits", cadence=cadence, streams=streams)


# ------------------------------------------------------------------------------------------
# Budgets
# ------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "per_week"),
    [("5/week", 5.0), ("1/day", 7.0), ("30/month", 7.0), ("2 per week", 2.0), ("0.5", 0.5)],
)
def test_budgets_read_as_false_alarms_per_week(text, per_week):
    assert parse_budget(text) == pytest.approx(per_week)


@pytest.mark.parametrize("text", ["five", "0/week", "-1/day", "5/year", "", "5/week/day"])
def test_unreadable_budgets_are_refused(text):
    with pytest.raises(BudgetError):
        parse_budget(text)


@pytest.fixture(scope="module")
def four_hourly_streams():
    """The search for 4 streams at a reading an hour (672 readings a week), 3 a week."""
    return search_budget(3.0, 4 * 7 * 24)


@pytest.mark.slow  # the budget search computes every candidate's run lengths
def test_budget_search_picks_the_quickest_set_that_fits(four_hourly_streams):
    found = four_hourly_streams
    assert [o.rules for o in sorted(found.options, key=lambda o: o.rules)] == sorted(CANDIDATES)
    # Recompute every candidate's figures and the choice from scratch.
    fitting = {}
    for text in CANDIDATES:
        alarms = 672 / run_length(text, 0.0).arl
        if alarms <= 3.0:
            fitting[text] = run_length(text, 1.0).arl
    assert fitting, "the budget should leave some candidates"
    assert len(fitting) < len(CANDIDATES), "the budget should rule some candidates out"
    chosen = found.chosen
    assert chosen is not None and chosen.rules in fitting
    assert chosen.fits and chosen.false_alarms_per_week <= 3.0
    assert chosen.one_sigma.arl == min(fitting.values())
    fastest = min(found.options, key=lambda o: o.one_sigma.arl)
    assert not fastest.fits  # the budget binds: the quickest candidate overall is too noisy
    assert found.needed_arl == pytest.approx(672 / 3.0)


def test_budget_search_says_when_nothing_fits():
    found = search_budget(0.01, 10_080, ["limits", "western-electric"])
    assert found.chosen is None
    assert not any(o.fits for o in found.options)


# ------------------------------------------------------------------------------------------
# limitwatch plan, through the installed console script
# ------------------------------------------------------------------------------------------


@pytest.fixture
def cache_home(tmp_path, monkeypatch):
    home = tmp_path / "cache-home"
    monkeypatch.setenv("XDG_CACHE_HOME", str(home))
    return home


@pytest.fixture
def warm_cache(cache_home, four_hourly_streams):
    """A cache file holding every candidate's run lengths (computed in this process), so the
    budget searches below read them instead of computing them again."""
    path = cache_home / "limitwatch" / "run-lengths.json"
    path.parent.mkdir(parents=True)
    path.write_text(json.dumps(arl.cache_export()), encoding="utf-8")
    return path


def fits_80_columns(text: str) -> bool:
    return all(len(line) <= 80 for line in text.splitlines())


def test_plan_ad_hoc_json(cache_home):
    result = cli("plan", "--cadence", "1m", "--rules", "beyond-limits", "--format", "json")
    assert result.returncode == 0, result.stderr
    out = json.loads(result.stdout)
    (plan,) = out["plans"]
    assert plan["cadence_seconds"] == 60.0
    assert plan["false_alarms_per_stream"]["week"] == pytest.approx(
        10_080 / shewhart_arl(0.0), rel=1e-9
    )
    for delay in plan["delays"]:
        assert delay["seconds"] == pytest.approx(60 * shewhart_arl(delay["shift_sigma"]))
    assert out["assumptions"] == list(ASSUMPTIONS)
    assert out["budget"] is None
    saved = json.loads((cache_home / "limitwatch" / "run-lengths.json").read_text())
    assert any("|beyond-limits(k=3.0)|shift=0.0|zero|" in key for key in saved)


def test_plan_ad_hoc_table_for_several_streams(cache_home):
    result = cli("plan", "--cadence", "30s", "--rules", "western-electric", "--streams", "25")
    assert result.returncode == 0, result.stderr
    text = result.stdout
    assert fits_80_columns(text)
    assert "all 25 streams" in text and "Assumptions:" in text and "independent" in text
    assert "one every ten minutes" in text  # 25 streams at 30 s are far past that rate
    help_text = cli("plan", "-h").stdout
    assert "--budget" in help_text and "independent" in help_text


def test_plan_totals_cover_all_streams(cache_home):
    result = cli(
        "plan", "--cadence", "8h", "--rules", "limits", "--streams", "12", "--format", "json"
    )
    (plan,) = json.loads(result.stdout)["plans"]
    for period in PERIODS:
        per_stream = plan["false_alarms_per_stream"][period]
        assert plan["false_alarms_total"][period] == pytest.approx(12 * per_stream)
    assert json.loads(result.stdout)["site_false_alarms"]["week"] == pytest.approx(
        plan["false_alarms_total"]["week"]
    )


@pytest.mark.slow  # the budget search computes every candidate's run lengths
def test_plan_with_a_budget(warm_cache):
    result = cli(
        "plan", "--cadence", "1h", "--rules", "limits", "--streams", "4", "--budget", "3/week",
        "--format", "json",
    )  # fmt: skip
    assert result.returncode == 0, result.stderr
    budget = json.loads(result.stdout)["budget"]
    assert budget["readings_per_week"] == pytest.approx(672)
    options = budget["options"]
    fitting = [o for o in options if o["false_alarms_per_week"] <= 3.0]
    assert all(o["fits"] == (o in fitting) for o in options)
    best = min(fitting, key=lambda o: o["one_sigma"]["arl"])
    assert budget["chosen"] == best["rules"]
    table = cli("plan", "--cadence", "1h", "--rules", "limits", "--streams", "4", "--budget",
                    "3/week")  # fmt: skip
    assert table.returncode == 0, table.stderr
    assert fits_80_columns(table.stdout)
    assert f"Best fit: {best['rules']}" in table.stdout


CONFIG = textwrap.dedent(
    """
    [defaults]
    rules = "limits"
    cadence = "1m"

    [[streams]]
    match = "line-1/*"
    rules = "beyond-limits"
    cadence = "8h"

    [[streams]]
    match = "oven-*"
    rules = "western-electric"

    [budget]
    false_alarms_per_week = 3.0
    """
)


@pytest.mark.slow  # the budget search computes every candidate's run lengths
def test_plan_from_a_config(tmp_path, warm_cache):
    path = tmp_path / "site.toml"
    path.write_text(CONFIG, encoding="utf-8")
    result = cli("plan", "--config", str(path), "--format", "json")
    assert result.returncode == 0, result.stderr
    out = json.loads(result.stdout)
    by_name = {p["name"]: p for p in out["plans"]}
    assert set(by_name) == {"line-1/*", "oven-*", "(defaults)"}
    assert by_name["line-1/*"]["cadence_seconds"] == 8 * 3600
    assert by_name["oven-*"]["rules"] == "western-electric"
    assert by_name["oven-*"]["cadence_seconds"] == 60  # from the defaults
    week = by_name["line-1/*"]["false_alarms_per_stream"]["week"]
    assert week == pytest.approx(21 / shewhart_arl(0.0))
    total = sum(p["false_alarms_total"]["week"] for p in out["plans"])
    assert out["site_false_alarms"]["week"] == pytest.approx(total)
    assert out["budget"]["budget_per_week"] == 3.0  # from [budget]
    assert out["budget"]["readings_per_week"] == pytest.approx(21 + 10_080 + 10_080)
    table = cli("plan", "--config", str(path))
    assert table.returncode == 0, table.stderr
    assert fits_80_columns(table.stdout)
    assert "Site total" in table.stdout


@pytest.mark.slow  # computes the run lengths of the config's rule sets from scratch
def test_plan_named_streams_of_a_config(tmp_path, cache_home):
    path = tmp_path / "site.toml"
    path.write_text(CONFIG.replace('cadence = "1m"\n', ""), encoding="utf-8")
    result = cli(
        "plan", "--config", str(path), "--stream", "line-1/temp", "--stream", "pump-9",
        "--budget", "100/week", "--format", "json",
    )  # fmt: skip
    assert result.returncode == 0, result.stderr
    out = json.loads(result.stdout)
    assert [p["name"] for p in out["plans"]] == ["line-1/temp"]
    assert out["plans"][0]["rules"] == "beyond-limits"
    assert out["unplanned"] == [{"name": "pump-9", "reason": "no cadence in the config"}]
    assert out["budget"]["budget_per_week"] == 100.0  # the option wins over [budget]


@pytest.mark.parametrize(
    ("args", "message"),
    [
        ((), "--cadence"),
        (("--cadence", "1m", "--budget", "lots"), "budget"),
        (("--cadence", "1m", "--rules", "limits, trnd"), "trnd"),
        (("--cadence", "soon"), "duration"),
        (("--cadence", "0s"), "longer than zero"),
        (("--cadence", "1m", "--stream", "a"), "--config"),
        (("--config", "x.toml", "--cadence", "1m"), "ad hoc"),
    ],
)
def test_plan_option_mistakes_exit_2(cache_home, args, message):
    result = cli("plan", *args)
    assert result.returncode == 2
    assert message in result.stderr


def test_plan_bad_config_exits_1(tmp_path, cache_home):
    result = cli("plan", "--config", str(tmp_path / "missing.toml"))
    assert result.returncode == 1
    assert "no such file" in result.stderr


def test_damaged_cache_is_ignored_with_a_warning(cache_home):
    path = cache_home / "limitwatch" / "run-lengths.json"
    path.parent.mkdir(parents=True)
    path.write_text("{not json", encoding="utf-8")
    result = cli("plan", "--cadence", "1m", "--rules", "beyond-limits")
    assert result.returncode == 0
    assert "ignoring the run-length cache" in result.stderr
    assert json.loads(path.read_text())  # rewritten with good data
