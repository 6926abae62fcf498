"""The false-alarm budget in ``limitwatch check``: the expected site rate against
``[budget] false_alarms_per_week``, through the installed console script.

The site is invented (a compressor line read every minute, packing lines once a shift). The
expected figures are rebuilt here from outside the project:

* three-sigma limits alone: ARL0 = 1 / P(|Z| > 3), with P from scipy.stats.norm;
* the Western Electric rules 1-4 (beyond-limits, two-of-three-zone-a, four-of-five-zone-b,
  run-one-side): ARL0 = 91.75, Champ & Woodall (1987), Technometrics 29(4), 393-399 (from
  memory);
* false alarms a week = readings a week / ARL0 (the renewal approximation the planner states).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from scipy.stats import norm

from tests.helpers import cli

WEEK = 7 * 86_400
SHEWHART_ARL0 = 1.0 / (2.0 * norm.sf(3.0))  # scipy.stats.norm: 370.4
WE_ARL0 = 91.75  # Champ & Woodall (1987), rules 1-4, from memory
WE_RULES = "beyond-limits, two-of-three-zone-a, four-of-five-zone-b, run-one-side"

COMP = WEEK / 60 / WE_ARL0  # comp-*/temp: a reading a minute, about 110 a week
PACK = WEEK / (8 * 3600) / SHEWHART_ARL0  # pack-*/downtime: one a shift, about 0.057 a week


def site(tmp_path: Path, budget: float | None, *, cadence: bool = True) -> Path:
    lines = [
        "[defaults]",
        'rules = "beyond-limits"',
        "",
        "[[streams]]",
        'match = "comp-*/temp"',
        f'rules = "{WE_RULES}"',
        'cadence = "1m"' if cadence else "",
        "",
        "[[streams]]",
        'match = "pack-*/downtime"',
        'cadence = "8h"' if cadence else "",
        "",
        "[[streams]]",
        'match = "oven-1/energy"',  # no cadence: not counted
    ]
    if budget is not None:
        lines += ["", "[budget]", f"false_alarms_per_week = {budget}"]
    path = tmp_path / "site.toml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def expected_figure(text: str) -> float:
    match = re.search(r"about ([0-9.e+-]+) false alarms a week", text)
    assert match is not None, text
    return float(match.group(1))


def budget_warning(text: str) -> str:
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("warning: budget:"))
    end = start + 1
    while end < len(lines) and lines[end].startswith("  "):
        end += 1
    return "\n".join(lines[start:end])


def test_over_budget_warns_names_the_noisiest_and_still_passes(tmp_path):
    path = site(tmp_path, 5)
    result = cli("check", "--config", str(path), "--file-only")
    assert result.returncode == 0, result.stderr
    out = result.stdout
    # the site figure: 110 + 0.057 a week, printed to three significant figures
    assert expected_figure(out) == pytest.approx(COMP + PACK, rel=5e-3)
    assert "from 2 streams" in out
    assert "oven-1/energy (no cadence)" in out and "[defaults] (no cadence)" in out
    assert "independent, normal readings" in out
    warning = budget_warning(out)
    flat = " ".join(warning.split())
    assert "over the budget of 5" in flat and "false_alarms_per_week" in flat
    # the noisiest first, each with its own figure
    assert flat.index("comp-*/temp") < flat.index("pack-*/downtime")
    named = re.search(r"comp-\*/temp ([0-9.]+) ", flat)
    assert named is not None and float(named.group(1)) == pytest.approx(COMP, rel=5e-3)
    assert f"limitwatch plan --config {path} --budget 5/week" in warning.splitlines()[-1]
    # words wrap at 80 columns; the command stays whole on its own line, to copy
    assert all(len(line) <= 80 for line in warning.splitlines()[:-1])


@pytest.mark.slow  # the budget search computes every candidate's run lengths
def test_the_suggested_plan_command_runs_and_finds_a_fit(tmp_path):
    path = site(tmp_path, 5)
    out = cli("check", "--config", str(path), "--file-only").stdout
    command = budget_warning(out).splitlines()[-1].split()
    assert command[:2] == ["limitwatch", "plan"]
    result = cli(*command[1:], "--format", "json", "--no-cache")
    assert result.returncode == 0, result.stderr
    search = json.loads(result.stdout)["budget"]
    assert search["budget_per_week"] == 5.0
    chosen = next(o for o in search["options"] if o["rules"] == search["chosen"])
    assert chosen["false_alarms_per_week"] <= 5.0


def test_within_budget_no_warning(tmp_path):
    result = cli("check", "--config", str(site(tmp_path, 200)), "--file-only")
    assert result.returncode == 0, result.stderr
    assert "warning: budget" not in result.stdout
    assert expected_figure(result.stdout) == pytest.approx(COMP + PACK, rel=5e-3)


def test_without_a_budget_the_figure_is_information(tmp_path):
    result = cli("check", "--config", str(site(tmp_path, None)), "--file-only")
    assert result.returncode == 0, result.stderr
    assert "warning: budget" not in result.stdout
    expected = next(line for line in result.stdout.splitlines() if line.startswith("expected"))
    assert "false alarms a week" in expected
    assert expected_figure(result.stdout) == pytest.approx(COMP + PACK, rel=5e-3)


def test_without_any_cadence_nothing_is_estimated(tmp_path):
    result = cli("check", "--config", str(site(tmp_path, 5, cadence=False)), "--file-only")
    assert result.returncode == 0, result.stderr
    assert "not estimated" in result.stdout and "warning: budget" not in result.stdout
