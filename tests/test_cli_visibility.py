"""What the commands leave unsaid: a replay that judged nothing, a learned baseline's first time
and average moving range, and one definition of a live alert. Real SQLite files filled through
the real pipeline, the installed console script.

Reference value: d2 = 1.128 for moving ranges of two (Montgomery, *Introduction to Statistical
Quality Control*, Appendix VI), so the average moving range shown equals 1.128 x sigma."""

from __future__ import annotations

import json

import numpy as np
import pytest

from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy
from limitwatch.engine import MonitorSettings
from limitwatch.model import Reading
from limitwatch.pipeline import Parsed, Pipeline
from limitwatch.store import Store
from tests.helpers import run_cli, write_csv

T0 = 1_798_761_600.0  # 2027-01-01T00:00:00Z
S = "kiln-1/temp"


def test_a_replay_that_never_leaves_learning_says_nothing_was_judged(tmp_path):
    path = write_csv(tmp_path / "t.csv", ["t", "v"], [[i, 10 + i % 3] for i in range(12)])
    result = run_cli("replay", str(path), "--value", "v", "--time", "t")
    assert result.returncode == 1
    assert "No signals" not in result.stdout
    assert "Nothing was judged" in result.stderr and "--baseline-first 25" in result.stderr
    assert "stream 'default' was never judged: it has 12 accepted reading(s)" in result.stderr


def test_a_replay_names_the_streams_it_could_not_judge(tmp_path):
    rows = [[i, "long", 10 + i % 3] for i in range(30)] + [[i, "short", 5] for i in range(4)]
    path = write_csv(tmp_path / "t.csv", ["t", "s", "v"], rows)
    result = run_cli(
        "replay", str(path), "--value", "v", "--time", "t", "--stream", "s", "--baseline-first",
        "20",
    )
    assert result.returncode == 0, result.stderr
    assert "stream 'short' was never judged" in result.stderr
    assert "'long'" not in result.stderr.split("never judged")[0].splitlines()[-1]


def filled(tmp_path) -> tuple[str, list[float]]:
    """A database whose stream learned its baseline from 25 readings, then signalled."""
    db = tmp_path / "lw.db"
    rng = np.random.default_rng(4)
    values = [float(v) for v in np.round(rng.normal(800.0, 4.0, 25), 2)] + [900.0]
    with Store.open(db, now=T0) as store:
        book = AlertBook(store, AlertPolicy())
        pipe = Pipeline(store, lambda s: MonitorSettings(learn_count=25, rules="limits"), book)
        for start in range(0, 26, 10):  # in several batches, as the service commits them
            chunk = values[start : start + 10]
            pipe.process(
                [
                    Parsed("gw", b"", reading=Reading(S, T0 + 60 * (start + i), v))
                    for i, v in enumerate(chunk)
                ],
                T0 + 60 * (start + len(chunk)),
            )
    return str(db), values


def test_baseline_show_gives_a_learned_baselines_first_time_and_moving_ranges(tmp_path):
    db, values = filled(tmp_path)
    shown = run_cli("baseline", "show", S, "--db", db)
    assert shown.returncode == 0, shown.stderr
    assert "2027-01-01T00:00:00Z to 2027-01-01T00:24:00Z" in shown.stdout
    assert "- to" not in shown.stdout
    mr_bar = float(np.abs(np.diff(values[:25])).mean())
    line = next(x for x in shown.stdout.splitlines() if x.startswith("  moving range"))
    assert f"average {mr_bar:.5g}" in line and "median" in line
    data = json.loads(run_cli("baseline", "show", S, "--db", db, "--format", "json").stdout)
    record = data[0] if isinstance(data, list) else data
    assert record["first_time"] == "2027-01-01T00:00:00Z"
    sigma = record["numbers"]["sigma"]
    assert mr_bar == pytest.approx(1.128 * sigma, rel=1e-3)  # d2, Montgomery App. VI


def test_streams_counts_live_alerts_as_the_report_does(tmp_path):
    """`streams` and the report count the same thing: live incidents, open or acknowledged.
    One stream has one incident (beyond-limits and mr-beyond-limit joined it); once it is
    acknowledged it is live but no longer open, and both still count it."""
    db, _ = filled(tmp_path)
    with Store.open(db, now=T0) as store:
        (incident,) = store.live_alerts([S])
        assert set(incident.rules) >= {"beyond-limits", "mr-beyond-limit"}
        store.acknowledge(incident.id, by="dana", now=T0 + 3600)
    (row,) = json.loads(run_cli("streams", "--db", db, "--format", "json").stdout)
    assert row["live_alerts"] == 1 and row["open_alerts"] == 0
    table = run_cli("streams", "--db", db).stdout.splitlines()
    header, cells = table[0].split(), next(x for x in table if x.startswith(S)).split()
    assert header[5] == "live" and cells[5] == "1"
    report = tmp_path / "report"
    assert run_cli("report", "--db", db, "--out", str(report)).returncode == 0
    page = next(report.glob("*.html")).read_text()
    assert "1 open or acknowledged alert(s)" in page
