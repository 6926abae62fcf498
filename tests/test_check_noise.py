"""`limitwatch check` on a noisy config with no budget, on globs that match many known streams,
and on missing secrets (the error names --file-only). Through the installed console script, with
a real SQLite database the service would use.

Expected figures are rebuilt from outside the project: Western Electric rules 1-4 have ARL0 =
91.75 (Champ & Woodall 1987, Technometrics 29(4), from memory); three-sigma limits alone have
ARL0 = 1 / P(|Z| > 3) with P from scipy.stats.norm; false alarms a week = readings a week / ARL0.
"""

from __future__ import annotations

import time

import pytest
from scipy.stats import norm

from limitwatch.model import Outcome, Reading
from limitwatch.store import Store
from tests.helpers import run_cli
from tests.test_budget import expected_figure, site

WEEK = 7 * 86_400
COMP = WEEK / 60 / 91.75  # comp-*/temp at 1m, Western Electric rules 1-4 (from memory)
PACK = WEEK / (8 * 3600) * 2.0 * norm.sf(3.0)  # pack-*/downtime at 8h, beyond-limits


def test_without_a_budget_a_noisy_stream_is_warned_about_as_a_default(tmp_path):
    result = run_cli("check", "--config", str(site(tmp_path, None)), "--file-only")
    assert result.returncode == 0, result.stderr
    warning = result.stdout[result.stdout.index("warning: noisy") :]
    words = " ".join(warning.split())
    assert "comp-*/temp 110 a week" in words and "pack-*" not in words
    assert "a default" in words and "common practice" in words
    with_budget = run_cli("check", "--config", str(site(tmp_path, 500)), "--file-only")
    assert "warning: noisy" not in with_budget.stdout  # the site's own budget rules


def test_a_glob_counts_the_streams_the_store_knows(tmp_path):
    config = site(tmp_path, None)
    config.write_text(config.read_text() + '\n[store]\npath = "lw.db"\n')
    one_each = run_cli("check", "--config", str(config), "--file-only")
    assert expected_figure(one_each.stdout) == pytest.approx(COMP + PACK, rel=5e-3)
    now = time.time()
    streams = [f"comp-{i}/temp" for i in range(6)] + ["pack-1/downtime", "oven-1/energy"]
    with Store.open(tmp_path / "lw.db", now=now) as store:
        store.add_readings(
            [Outcome(Reading(s, now, 1.0), True, None, 0, "learning") for s in streams], now=now
        )
    counted = run_cli("check", "--config", str(config), "--file-only")
    assert counted.returncode == 0, counted.stderr
    assert expected_figure(counted.stdout) == pytest.approx(6 * COMP + PACK, rel=5e-3)
    words = " ".join(counted.stdout.split())
    assert "the database at store.path has seen" in words
    assert "x6 streams" in words


def test_missing_secrets_name_file_only(tmp_path):
    path = tmp_path / "site.toml"
    path.write_text(
        '[[notifiers]]\nname = "hook"\ntype = "webhook"\n'
        'url = "https://hooks.quillmoor.example/x"\nsecret_file = "missing-secret"\n'
    )
    result = run_cli("check", "--config", str(path))
    assert result.returncode == 1
    assert "missing-secret" in result.stderr and "--file-only" in result.stderr
