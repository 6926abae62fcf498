"""The operator's commands (alerts, ack, log, shelve, unshelve, streams, baseline show / history /
refit) through the installed console script, against a real SQLite file that the test fills
through the real Store and AlertBook, the way the service does.

The plant here is invented (a kiln, a press, a compressor, an oven); the readings are seeded
random numbers. Times are anchored a few hours before the real clock, because the commands read
"now" from the clock as an operator's terminal would.

Reference values: the moving-range constants for n = 2, d2 = 1.128 and E2 = 2.660, are from
Montgomery, *Introduction to Statistical Quality Control*, Appendix VI.
"""

from __future__ import annotations

import getpass
import hashlib
import json
import os
import sqlite3
import subprocess
import time
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import click
import numpy as np
import pytest
from scipy.stats import norm

from limitwatch import SAFETY_CAUTION
from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy, SeverityRule
from limitwatch.model import Outcome, Reading, StreamSignal
from limitwatch.stats.baseline import fit_baseline
from limitwatch.store import Store, open_store
from tests.helpers import CLI, CliResult, cli

D2 = 1.128  # Montgomery, Introduction to SQC, Appendix VI, n = 2
E2 = 2.660  # ditto: 3 / d2

KILN = "kiln-2/temp"
PRESS = "press-4/downtime"
LONG = "comp-a/aftercooler-discharge-temperature"
OVEN = "oven-1/energy"
POLICY = AlertPolicy(
    clear_after=3, severities=(SeverityRule("kiln-*", "beyond-limits", "critical"),)
)
ALERT_KEYS = {
    "id",
    "stream",
    "rule",
    "rule_words",
    "rules",
    "state",
    "severity",
    "count",
    "opened_at",
    "first_time",
    "first_value",
    "last_time",
    "last_value",
    "worst_zone",
    "silent_since",
    "center",
    "lcl",
    "ucl",
    "baseline_version",
    "acknowledged_at",
    "acknowledged_by",
    "ack_note",
    "cleared_at",
    "merged_into",
    "shelved_until",
}


def epoch(text: str) -> float:
    return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()


def fits_80(text: str) -> bool:
    return max((len(line) for line in text.splitlines()), default=0) <= 80


# -- the plant ---------------------------------------------------------------------------------


@dataclass
class Plant:
    path: Path | str
    """The SQLite file, or the PostgreSQL URL, as ``--db`` takes it."""
    base: float
    folder: Path = Path(".")
    """Where a test writes config files (the SQLite file's folder)."""
    values: dict[str, list[float]] = field(default_factory=dict)
    alerts: dict[str, int] = field(default_factory=dict)

    @property
    def store_value(self) -> str:
        """What a config in :attr:`folder` writes as ``store.path``: the file's name (a relative
        path is taken from the config's folder), or the URL."""
        return self.path.name if isinstance(self.path, Path) else self.path

    def time_of(self, index: int) -> float:
        return self.base + 60.0 * index

    def cli(self, *args: str) -> CliResult:
        return cli(*args, "--db", str(self.path))

    def json(self, *args: str) -> object:
        result = self.cli(*args, "--format", "json")
        assert result.returncode == 0, result.stderr
        return json.loads(result.stdout)


def _signal(
    plant: Plant, stream: str, rule: str, index: int, center: float, sigma: float
) -> StreamSignal:
    value = plant.values[stream][index]
    return StreamSignal(
        stream=stream,
        rule=rule,
        chart="x",
        side="upper",
        index=index,
        time=plant.time_of(index),
        value=value,
        involved=(index,),
        center=center,
        sigma=sigma,
        ucl=center + 3 * sigma,
        lcl=center - 3 * sigma,
        mr=None,
        mr_ucl=3.267 * D2 * sigma,
        baseline_version=1,
    )


def _feed(
    plant: Plant,
    store: Store,
    book: AlertBook,
    stream: str,
    values: list[float],
    signals: dict[int, list[str]],
    *,
    learn: int = 25,
    lower_bound: float | None = None,
) -> tuple[float, float]:
    """Store the stream's readings one batch each, as the service would, with the baseline
    learned from the first ``learn`` readings as version 1; return its (center, sigma)."""
    plant.values[stream] = values
    first = np.array(values[:learn])
    center = float(first.mean())
    sigma = float(np.abs(np.diff(first)).mean()) / D2
    for i, value in enumerate(values):
        t = plant.time_of(i)
        phase = "learning" if i < learn else "monitoring"
        sigs = tuple(_signal(plant, stream, r, i, center, sigma) for r in signals.get(i, []))
        out = Outcome(Reading(stream, t, value), True, index=i, phase=phase, signals=sigs)
        with store.transaction():
            store.add_readings([out], now=t + 1)
            book.apply([out], now=t + 1)
            if i == learn - 1:
                fitted = fit_baseline(values[:learn], lower_bound=lower_bound)
                store.add_baseline(
                    stream,
                    fitted.to_dict(),
                    now=t + 1,
                    by="limitwatch",
                    reason=f"learned from the stream's readings 0..{i}",
                    method="mean",
                    version=1,
                    first_index=0,
                    last_index=i,
                    first_time=plant.time_of(0),
                    last_time=t,
                )
    return center, sigma


def _build(path: Path | str, folder: Path) -> Plant:
    plant = Plant(path, base=time.time() - 3 * 3600, folder=folder)
    rng = np.random.default_rng(20270105)
    with open_store(path, now=plant.base) as store:
        book = AlertBook(store, POLICY)

        # Kiln: beyond-limits three times in a row, then a trend signal on the last reading,
        # which sits 2.5 sigma above the center line (zone A): one incident, count 4.
        kiln = [round(float(v), 2) for v in rng.normal(820.0, 2.0, 45)]
        first = np.array(kiln[:25])
        center, sigma = float(first.mean()), float(np.abs(np.diff(first)).mean()) / D2
        for i in (40, 41, 42):
            kiln[i] = round(center + 4 * sigma, 2)
        kiln[44] = center + 2.5 * sigma
        _feed(
            plant,
            store,
            book,
            KILN,
            kiln,
            {40: ["beyond-limits"], 41: ["beyond-limits"], 42: ["beyond-limits"], 44: ["trend"]},
        )

        # Press: a run alert that clears after three quiet readings.
        press = [round(float(v), 1) for v in np.clip(rng.normal(18.0, 3.0, 34), 0, None)]
        _feed(plant, store, book, PRESS, press, {30: ["run-one-side"]}, lower_bound=0.0)

        # A stream with a long id, to make the tables cut it.
        long = [round(float(v), 2) for v in rng.normal(64.0, 0.5, 30)]
        _feed(plant, store, book, LONG, long, {27: ["four-of-five-zone-b"]})

        # Oven: steady, one wild batch at index 37 (door left open), for refits.
        oven = [round(float(v), 2) for v in rng.normal(50.0, 1.0, 50)]
        oven[37] = 80.0
        _feed(plant, store, book, OVEN, oven, {37: ["beyond-limits"]})

        for a in store.alerts():
            for rule in a.rules:
                plant.alerts[f"{a.stream} {rule}"] = a.id
    return plant


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.integration)])
def plant(request: pytest.FixtureRequest, tmp_path: Path) -> Plant:
    """The plant in an SQLite file, and again in a PostgreSQL database (``--db
    postgresql://...``): every operator command here runs against both."""
    if request.param == "postgresql":
        return _build(request.getfixturevalue("pg_url"), tmp_path)
    return _build(tmp_path / "plant.db", tmp_path)


def alert_id(plant: Plant, stream: str, rule: str) -> int:
    return plant.alerts[f"{stream} {rule}"]


# -- alerts ------------------------------------------------------------------------------------


def test_alerts_lists_open_and_acknowledged_by_default(plant: Plant) -> None:
    listed = plant.json("alerts")
    assert isinstance(listed, list)
    # One incident per stream; the trend on the kiln joined its beyond-limits incident.
    assert {(a["stream"], a["rule"]) for a in listed} == {
        (KILN, "beyond-limits"),
        (LONG, "four-of-five-zone-b"),
    }
    assert [a["id"] for a in listed] == sorted((a["id"] for a in listed), reverse=True)
    for a in listed:
        assert set(a) == ALERT_KEYS
        assert a["state"] == "open" and a["cleared_at"] is None
    kiln = next(a for a in listed if a["stream"] == KILN)
    assert kiln["severity"] == "critical" and kiln["count"] == 4
    assert kiln["last_value"] == plant.values[KILN][44]
    assert epoch(kiln["first_time"]) == pytest.approx(plant.time_of(40))
    assert epoch(kiln["last_time"]) == pytest.approx(plant.time_of(44))
    assert kiln["worst_zone"] == "beyond"  # the readings at 4 sigma
    by_rule = {r["rule"]: r for r in kiln["rules"]}
    assert list(by_rule) == ["beyond-limits", "trend"]
    assert (by_rule["beyond-limits"]["count"], by_rule["beyond-limits"]["severity"]) == (
        3,
        "critical",
    )
    assert (by_rule["trend"]["count"], by_rule["trend"]["severity"]) == (1, "warning")
    assert epoch(by_rule["trend"]["first_time"]) == pytest.approx(plant.time_of(44))


def test_alerts_filters_by_state_and_stream(plant: Plant) -> None:
    cleared = plant.json("alerts", "--state", "cleared")
    assert {(a["stream"], a["rule"], a["state"]) for a in cleared} == {
        (PRESS, "run-one-side", "cleared"),
        (OVEN, "beyond-limits", "cleared"),  # three quiet readings after the wild batch
    }
    assert all(a["cleared_at"] is not None for a in cleared)
    assert len(plant.json("alerts", "--state", "all")) == 4
    kiln_only = plant.json("alerts", "--stream", "kiln-*")
    assert {a["stream"] for a in kiln_only} == {KILN} and len(kiln_only) == 1
    assert plant.json("alerts", "--stream", "nothing-*") == []
    # The state filter takes the words the table prints.
    plant.cli("ack", str(kiln_only[0]["id"]), "--by", "dana")
    for word in ("acked", "ACKED", "acknowledged"):
        assert [a["id"] for a in plant.json("alerts", "--state", word)] == [kiln_only[0]["id"]]
    assert len(plant.json("alerts", "--state", "live")) == 2


def test_alerts_table_fits_80_columns_and_names_every_alert(plant: Plant) -> None:
    result = plant.cli("alerts", "--state", "all")
    assert result.returncode == 0, result.stderr
    assert fits_80(result.stdout)
    lines = result.stdout.splitlines()
    assert lines[0].split() == [
        "id",
        "state",
        "severity",
        "stream",
        "rules",
        "count",
        "opened",
        "value",
    ]
    for key, number in plant.alerts.items():
        row = next(line for line in lines[2:] if line.split()[0] == str(number))
        if key != f"{KILN} trend":
            assert key.split()[1][:8] in row
    kiln = next(line for line in lines[2:] if line.split()[0] == str(plant.alerts[f"{KILN} trend"]))
    assert "beyond-limits +1" in kiln  # the rule that opened it, and one that joined
    # The long stream id is shortened with an ellipsis, not wrapped or dropped.
    assert "comp-a/" in result.stdout and "…" in result.stdout
    assert "4 incident(s)." in result.stdout
    assert "ago" in result.stdout


# -- ack and log -------------------------------------------------------------------------------


def test_ack_then_ack_again_is_an_error(plant: Plant) -> None:
    number = alert_id(plant, KILN, "beyond-limits")
    first = plant.cli("ack", str(number), "--note", "burner 3 flame check", "--by", "dana")
    assert first.returncode == 0, first.stderr
    assert f"incident {number}" in first.stdout and "dana" in first.stdout
    listed = {a["id"]: a for a in plant.json("alerts")}
    assert listed[number]["state"] == "acknowledged"
    assert listed[number]["acknowledged_by"] == "dana"
    assert listed[number]["ack_note"] == "burner 3 flame check"
    assert abs(epoch(listed[number]["acknowledged_at"]) - time.time()) < 120

    again = plant.cli("ack", str(number), "--by", "lee")
    assert again.returncode == 1
    assert "already acknowledged by dana" in again.stderr
    assert plant.json("alerts", "--state", "acknowledged")[0]["acknowledged_by"] == "dana"


def test_ack_without_by_records_the_login_name(plant: Plant) -> None:
    number = alert_id(plant, LONG, "four-of-five-zone-b")
    result = plant.cli("ack", str(number))
    assert result.returncode == 0, result.stderr
    [acked] = plant.json("alerts", "--state", "acknowledged")
    assert acked["id"] == number and acked["acknowledged_by"] == getpass.getuser()


def test_ack_unknown_alert_is_an_error(plant: Plant) -> None:
    result = plant.cli("ack", "9999")
    assert result.returncode == 1
    assert "no alert has id 9999" in result.stderr
    assert result.stdout == ""


def test_ack_cleared_alert_is_an_error(plant: Plant) -> None:
    number = alert_id(plant, PRESS, "run-one-side")
    result = plant.cli("ack", str(number), "--by", "dana")
    assert result.returncode == 1
    assert "already cleared" in result.stderr
    cleared = {a["id"]: a for a in plant.json("alerts", "--state", "cleared")}
    assert cleared[number]["acknowledged_by"] is None


def test_log_shows_opened_and_acknowledged_with_actor_and_note(plant: Plant) -> None:
    number = alert_id(plant, KILN, "trend")
    note = "thermocouple 2 drifting; swapped for the spare, watching the next hour before closing"
    assert plant.cli("ack", str(number), "--by", "rafa", "--note", note).returncode == 0

    result = plant.cli("log", str(number))
    assert result.returncode == 0, result.stderr
    assert fits_80(result.stdout)
    assert f"Incident {number} on {KILN}" in result.stdout
    assert "kept rising" in result.stdout  # each rule in words
    assert "beyond-limits" in result.stdout and "trend" in result.stdout
    rows = result.stdout.splitlines()
    kinds = [line.split()[1] for line in rows if line[:4].isdigit() and "T" in line.split()[0]]
    assert kinds[0] == "opened" and kinds[-1] == "acknowledged" and "joined" in kinds
    ack_row = next(line for line in rows if " acknowledged " in line)
    assert "rafa" in ack_row
    # The long note is wrapped, not cut: every word of it is in the table.
    body = " ".join(line[40:] for line in rows)
    assert all(word in body for word in note.split())

    data = plant.json("log", str(number))
    assert data["alert"]["id"] == number and data["alert"]["state"] == "acknowledged"
    events = data["events"]
    assert events[0]["kind"] == "opened" and events[0]["actor"] == "limitwatch"
    assert events[-1] == {
        "time": events[-1]["time"],
        "kind": "acknowledged",
        "actor": "rafa",
        "note": note,
        "data": None,
    }
    assert [e["time"] for e in events] == sorted(e["time"] for e in events)


def test_log_of_unknown_alert_is_an_error(plant: Plant) -> None:
    result = plant.cli("log", "4242")
    assert result.returncode == 1 and "no alert has id 4242" in result.stderr


# -- shelves -----------------------------------------------------------------------------------


def _stream(plant: Plant, name: str) -> dict:
    return next(s for s in plant.json("streams") if s["stream"] == name)


def test_shelve_and_unshelve_round_trip(plant: Plant) -> None:
    live = alert_id(plant, KILN, "trend")  # still live after the reading added below
    before = time.time()
    shelved = plant.cli(
        "shelve", "kiln-*", "--for", "2h", "--reason", "burner service", "--by", "sam"
    )
    assert shelved.returncode == 0, shelved.stderr
    assert fits_80(shelved.stdout)
    assert "Streams covered (1):" in shelved.stdout and f"  {KILN}" in shelved.stdout
    assert SAFETY_CAUTION in " ".join(shelved.stdout.split())

    row = _stream(plant, KILN)
    until = epoch(row["shelved_until"])
    # the shown time has whole milliseconds, so it may fall up to 1 ms before `before + 2h`
    assert before + 7200 - 0.001 <= until <= time.time() + 7200
    assert row["shelves"] == [
        {"rule": None, "until": row["shelved_until"], "reason": "burner service", "by": "sam"}
    ]
    assert _stream(plant, OVEN)["shelved_until"] is None
    table = plant.cli("streams")
    kiln_row = next(line for line in table.stdout.splitlines() if line.startswith(KILN))
    assert "all 1h59m" in kiln_row or "all 2h" in kiln_row
    assert [a["shelved_until"] for a in plant.json("alerts", "--stream", KILN)] == [
        row["shelved_until"]
    ]

    # The live alert's log says who shelved it and why ...
    events = plant.json("log", str(live))["events"]
    shelf_event = next(e for e in events if e["kind"] == "shelved")
    assert shelf_event["actor"] == "sam" and "burner service" in shelf_event["note"]

    # ... and a new incident on a shelved stream is recorded but its notification held.
    assert plant.cli("shelve", PRESS, "--for", "1h", "--reason", "die change").returncode == 0
    with open_store(plant.path) as store:
        book = AlertBook(store, POLICY)
        t = time.time()
        sig = StreamSignal(
            PRESS,
            "two-of-three-zone-a",
            "x",
            "upper",
            45,
            t,
            826.0,
            (44, 45),
            820.0,
            2.0,
            826.0,
            814.0,
            1.0,
            7.4,
            1,
        )
        out = Outcome(Reading(PRESS, t, 826.0), True, index=45, phase="monitoring", signals=(sig,))
        with store.transaction():
            store.add_readings([out], now=t)
            report = book.apply([out], now=t)
        assert report.opened == 1 and report.suppressed == 1 and report.queued == 0
        (held,) = store.live_alerts([PRESS])
    held_events = plant.json("log", str(held.id))["events"]
    assert [e["kind"] for e in held_events] == ["opened", "suppressed"]
    assert "die change" in held_events[1]["note"]

    ended = plant.cli("unshelve", KILN, "--by", "sam")
    assert ended.returncode == 0, ended.stderr
    assert "burner service" in ended.stdout
    row = _stream(plant, KILN)
    assert row["shelved_until"] is None and row["shelves"] == []
    unshelved = [e for e in plant.json("log", str(live))["events"] if e["kind"] == "unshelved"]
    assert len(unshelved) == 1 and unshelved[0]["actor"] == "sam"

    again = plant.cli("unshelve", KILN, "--by", "sam")
    assert again.returncode == 1 and "nothing is shelved" in again.stderr


def test_shelve_one_rule_holds_only_incidents_made_of_that_rule(plant: Plant) -> None:
    result = plant.cli("shelve", KILN, "--rule", "trend", "--for", "90m", "--reason", "probe swap")
    assert result.returncode == 0, result.stderr
    # The kiln incident says beyond-limits too, which is not shelved: nothing is held.
    (kiln,) = plant.json("alerts", "--stream", KILN)
    assert kiln["shelved_until"] is None
    assert plant.cli("shelve", KILN, "--rule", "beyond-limits", "--for", "1h", "--reason", "x")
    (kiln,) = plant.json("alerts", "--stream", KILN)
    assert kiln["shelved_until"] is not None  # now every rule in it is shelved
    row = _stream(plant, KILN)
    assert row["shelved_until"] is None
    assert sorted(s["rule"] for s in row["shelves"]) == ["beyond-limits", "trend"]


def test_shelve_refuses_bad_options(plant: Plant) -> None:
    cases = [
        (["--rule", "no-such-rule", "--for", "8h"], "beyond-limits"),  # lists the known ids
        (["--for", "soon"], "not a duration"),
        (["--for", "8"], "no unit"),
        (["--for", "0m"], "positive"),
    ]
    for args, needle in cases:
        result = plant.cli("shelve", KILN, "--reason", "maintenance", *args)
        assert result.returncode == 2, args
        assert needle in result.stderr, (args, result.stderr)
    assert _stream(plant, KILN)["shelves"] == []


def test_shelve_unknown_stream_is_an_error(plant: Plant) -> None:
    result = plant.cli("shelve", "kiln-9/temp", "--for", "1h", "--reason", "typo")
    assert result.returncode == 1
    assert "kiln-9/temp" in result.stderr and "limitwatch streams" in result.stderr


# -- streams -----------------------------------------------------------------------------------


def test_streams_reports_last_value_zone_version_and_alerts(plant: Plant) -> None:
    rows = {s["stream"]: s for s in plant.json("streams")}
    assert sorted(rows) == sorted([KILN, PRESS, LONG, OVEN])
    kiln = rows[KILN]
    assert kiln["last_value"] == pytest.approx(plant.values[KILN][-1])
    assert epoch(kiln["last_time"]) == pytest.approx(plant.time_of(44))
    assert kiln["zone"] == "zone-a-upper"  # the last reading was placed 2.5 sigma above
    assert kiln["phase"] == "monitoring" and kiln["baseline_version"] == 1
    assert kiln["open_alerts"] == 1 and kiln["acknowledged_alerts"] == 0
    first = np.array(plant.values[KILN][:25])
    mr_bar = float(np.abs(np.diff(first)).mean())
    assert kiln["center"] == pytest.approx(float(first.mean()))
    assert kiln["ucl"] == pytest.approx(float(first.mean()) + E2 * mr_bar, rel=1e-4)
    assert rows[PRESS]["open_alerts"] == 0
    assert rows[PRESS]["lcl"] is None or rows[PRESS]["lcl"] >= 0  # natural bound at 0

    table = plant.cli("streams")
    assert table.returncode == 0, table.stderr
    assert fits_80(table.stdout)
    kiln_row = next(line for line in table.stdout.splitlines() if line.startswith(KILN))
    assert kiln_row.split()[1:6] == [
        f"{plant.values[KILN][-1]:.5g}",
        "zone-a-upper",
        "monitoring",
        "v1",
        "1",
    ]
    assert [s["stream"] for s in plant.json("streams", "--stream", "*/temp")] == [KILN]


def test_streams_shows_expected_false_alarms_from_the_config(plant: Plant) -> None:
    config = plant.folder / "site.toml"
    config.write_text(
        "\n".join(
            [
                "[store]",
                f'path = "{plant.store_value}"',
                "[defaults]",
                'rules = "western-electric"',  # no cadence: unknown
                "[[streams]]",
                'match = "kiln-*"',
                'rules = "beyond-limits"',
                'cadence = "1m"',
                "[[streams]]",
                'match = "press-*"',
                'rules = "beyond-limits, two-of-three-zone-a, four-of-five-zone-b, run-one-side"',
                'cadence = "8h"',
            ]
        )
        + "\n",
        encoding="utf-8",
    )
    listed = cli("streams", "--config", str(config), "--format", "json")
    assert listed.returncode == 0, listed.stderr
    rows = {s["stream"]: s for s in json.loads(listed.stdout)}
    # three-sigma limits alone: ARL0 = 1 / P(|Z| > 3) (scipy.stats.norm), 10,080 readings a week
    shewhart_arl0 = 1.0 / (2.0 * norm.sf(3.0))
    assert rows[KILN]["false_alarms_per_week"] == pytest.approx(10_080 / shewhart_arl0, rel=1e-9)
    # Western Electric rules 1-4: ARL0 91.75, Champ & Woodall (1987), Technometrics 29(4), from
    # memory; 21 readings a week at one per 8-hour shift
    assert rows[PRESS]["false_alarms_per_week"] == pytest.approx(21 / 91.75, rel=1e-4)
    assert rows[OVEN]["false_alarms_per_week"] is None  # [defaults] has no cadence
    assert rows[LONG]["false_alarms_per_week"] is None
    # without --config there are no rules or cadences to plan from
    assert all(s["false_alarms_per_week"] is None for s in plant.json("streams"))

    table = cli("streams", "--config", str(config))
    assert table.returncode == 0, table.stderr
    assert fits_80(table.stdout)
    lines = table.stdout.splitlines()
    assert lines[0].split()[-1] == "false/wk"
    cells = {name: line.split() for name, line in zip(rows, lines[2:], strict=False)}
    assert cells[KILN][0] == KILN and cells[KILN][-1] == f"{10_080 / shewhart_arl0:.3g}"
    assert cells[OVEN][0].startswith("oven-1/") and cells[OVEN][-1] == "-"
    assert "false alarms a week" in cli("streams", "--help").stdout
    # without a config the column would hold only '-': it is left out
    assert "false/wk" not in plant.cli("streams").stdout


# -- baselines ---------------------------------------------------------------------------------


def test_refit_creates_version_2_with_provenance(plant: Plant) -> None:
    result = plant.cli(
        "baseline", "refit", KILN, "--last", "30", "--reason", "new burner nozzles", "--by", "kim"
    )
    assert result.returncode == 0, result.stderr
    assert "Baseline version 2 of kiln-2/temp" in result.stdout and fits_80(result.stdout)

    history = plant.json("baseline", "history", KILN)
    assert [v["version"] for v in history] == [1, 2]
    v2 = history[1]
    assert v2["created_by"] == "kim" and v2["reason"] == "new burner nozzles"
    assert v2["method"] == "mean" and v2["excluded"] == []
    assert (v2["first_index"], v2["last_index"]) == (15, 44)
    assert epoch(v2["first_time"]) == pytest.approx(plant.time_of(15))
    assert epoch(v2["last_time"]) == pytest.approx(plant.time_of(44))
    window = np.array(plant.values[KILN][15:45])
    mr_bar = float(np.abs(np.diff(window)).mean())
    numbers = v2["numbers"]
    assert numbers["center"] == pytest.approx(float(window.mean()))
    assert numbers["sigma"] == pytest.approx(mr_bar / D2, rel=1e-3)
    assert numbers["ucl"] == pytest.approx(float(window.mean()) + E2 * mr_bar, rel=1e-3)
    assert history[0]["created_by"] == "limitwatch"

    text = plant.cli("baseline", "history", KILN)
    assert text.returncode == 0 and fits_80(text.stdout)
    assert "Baseline version 1" in text.stdout and "Baseline version 2" in text.stdout
    assert "new burner nozzles" in text.stdout and "by kim" in text.stdout
    assert "index 15 to 44" in text.stdout

    shown = plant.json("baseline", "show", KILN)
    assert shown["version"] == 2 and shown["reason"] == "new burner nozzles"
    assert _stream(plant, KILN)["baseline_version"] == 2


def test_refit_with_exclusion_records_the_stream_index(plant: Plant) -> None:
    result = plant.cli(
        "baseline",
        "refit",
        OVEN,
        "--last",
        "30",
        "--exclude-beyond",
        "--method",
        "median",
        "--reason",
        "after the door repair",
    )
    assert result.returncode == 0, result.stderr
    current = plant.json("baseline", "show", OVEN)
    assert current["version"] == 2 and current["method"] == "median"
    assert current["excluded"] == [37]  # the wild batch, by its index in the stream
    assert (current["first_index"], current["last_index"]) == (20, 49)
    kept = [v for i, v in enumerate(plant.values[OVEN][20:50], start=20) if i != 37]
    assert current["numbers"]["center"] == pytest.approx(float(np.mean(kept)))
    text = plant.cli("baseline", "show", OVEN)
    assert "excluded      37" in text.stdout and "median moving range" in text.stdout


def test_refit_keeps_the_natural_bound(plant: Plant) -> None:
    result = plant.cli("baseline", "refit", PRESS, "--reason", "new die set", "--by", "kim")
    assert result.returncode == 0, result.stderr
    numbers = plant.json("baseline", "show", PRESS)["numbers"]
    assert numbers["lower_bound"] == 0.0


def test_refit_refusals(plant: Plant) -> None:
    too_few = plant.cli("baseline", "refit", KILN, "--last", "5", "--reason", "x", "--by", "k")
    assert too_few.returncode == 1 and "fewer than the 10" in too_few.stderr
    unknown = plant.cli("baseline", "refit", "kiln-9/temp", "--reason", "x", "--by", "k")
    assert unknown.returncode == 1 and "kiln-9/temp" in unknown.stderr
    no_reason = plant.cli("baseline", "refit", KILN, "--by", "k")
    assert no_reason.returncode == 2 and "--reason" in no_reason.stderr
    assert [v["version"] for v in plant.json("baseline", "history", KILN)] == [1]
    fewer = plant.cli(
        "baseline", "refit", KILN, "--last", "8", "--min-points", "8", "--reason", "x", "--by", "k"
    )
    assert fewer.returncode == 0, fewer.stderr
    assert "provisional" in fewer.stdout  # the library's warning about few points is shown
    v2 = plant.json("baseline", "show", KILN)
    assert (v2["version"], v2["first_index"], v2["last_index"]) == (2, 37, 44)


def test_baseline_show_text_and_unknown_stream(plant: Plant) -> None:
    shown = plant.cli("baseline", "show", KILN)
    assert shown.returncode == 0, shown.stderr
    assert fits_80(shown.stdout)
    assert "learned from the stream's readings 0..24" in shown.stdout
    assert "by limitwatch" in shown.stdout
    missing = plant.cli("baseline", "show", "kiln-9/temp")
    assert missing.returncode == 1 and "kiln-9/temp" in missing.stderr


# -- finding the database --------------------------------------------------------------------


def _run_env(*args: str, cwd: Path, env: dict[str, str]) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [str(CLI), *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        env={**os.environ, **env},
        timeout=120,
    )


@pytest.mark.parametrize("command", [["alerts"], ["ack", "1", "--by", "x"], ["streams"]])
def test_missing_db_file_is_an_error_naming_the_path(tmp_path: Path, command: list[str]) -> None:
    missing = tmp_path / "nowhere" / "plant.db"
    result = cli(*command, "--db", str(missing))
    assert result.returncode == 1
    assert str(missing) in result.stderr
    assert not missing.exists() and not missing.parent.exists()


def test_default_location_and_environment_variable(plant: Plant, tmp_path: Path) -> None:
    work = tmp_path / "elsewhere"
    work.mkdir()
    env = {k: v for k, v in os.environ.items() if k != "LIMITWATCH_DB"}
    nothing = subprocess.run(
        [str(CLI), "alerts"], capture_output=True, text=True, cwd=work, env=env, timeout=120
    )
    assert nothing.returncode == 1 and "limitwatch.db" in nothing.stderr
    assert not (work / "limitwatch.db").exists()

    via_env = _run_env(
        "alerts", "--format", "json", cwd=work, env={"LIMITWATCH_DB": str(plant.path)}
    )
    assert via_env.returncode == 0, via_env.stderr
    assert len(json.loads(via_env.stdout)) == 2


def test_not_a_database_and_a_foreign_database_are_refused(tmp_path: Path) -> None:
    text = tmp_path / "notes.db"
    text.write_text("shift handover notes\n" * 50, encoding="utf-8")
    result = cli("alerts", "--db", str(text))
    assert result.returncode == 1 and "not an SQLite database" in result.stderr

    foreign = tmp_path / "other.db"
    with sqlite3.connect(foreign) as conn:
        conn.execute("CREATE TABLE parts (id INTEGER PRIMARY KEY)")
    conn.close()
    result = cli("ack", "1", "--by", "x", "--db", str(foreign))
    assert result.returncode == 1 and "not a limitwatch database" in result.stderr
    with sqlite3.connect(foreign) as conn:
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    conn.close()
    assert tables == {"parts"}  # nothing was added to someone else's file


def test_config_file_names_the_database(plant: Plant, tmp_path: Path) -> None:
    # A relative store.path is taken from the config file's folder, wherever the command runs.
    config = plant.folder / "site.toml"
    config.write_text(f'[store]\npath = "{plant.store_value}"\n', encoding="utf-8")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    result = cli("alerts", "--config", str(config), "--format", "json", cwd=elsewhere)
    assert result.returncode == 0, result.stderr
    assert len(json.loads(result.stdout)) == 2

    both = plant.cli("alerts", "--config", str(config))
    assert both.returncode == 2 and "not both" in both.stderr

    typo = tmp_path / "typo.toml"
    typo.write_text('[store]\npaht = "plant.db"\n', encoding="utf-8")
    bad = cli("alerts", "--config", str(typo))
    assert bad.returncode == 1 and "store.paht" in bad.stderr


def test_reading_commands_leave_the_file_untouched(plant: Plant) -> None:
    if not isinstance(plant.path, Path):
        pytest.skip("about the SQLite file's bytes; test_store_backends checks PostgreSQL's look")
    before = hashlib.sha256(plant.path.read_bytes()).hexdigest()
    number = alert_id(plant, KILN, "beyond-limits")
    for args in (["alerts"], ["streams"], ["log", str(number)]):
        assert plant.cli(*args).returncode == 0
    assert hashlib.sha256(plant.path.read_bytes()).hexdigest() == before


# -- every command explains itself -------------------------------------------------------------


def _walk(group: click.Group, prefix: str = "") -> list[tuple[str, click.Command]]:
    found: list[tuple[str, click.Command]] = []
    for name, command in sorted(group.commands.items()):
        path = f"{prefix}{name}"
        found.append((path, command))
        if isinstance(command, click.Group):
            found.extend(_walk(command, path + " "))
    return found


def test_every_command_and_group_has_help_text() -> None:
    from limitwatch.cli import main

    commands = _walk(main)
    names = {path for path, _ in commands}
    assert {"alerts", "ack", "log", "shelve", "unshelve", "streams"} <= names
    assert {"baseline show", "baseline history", "baseline refit"} <= names
    missing = [path for path, c in commands if not (c.help or "").strip()]
    assert missing == [], f"commands without help text: {missing}"
    no_example = [
        path
        for path, c in commands
        if not isinstance(c, click.Group) and "example" not in (c.help or "").lower()
    ]
    assert no_example == [], f"commands without an example in their help: {no_example}"
    # The installed script shows the same commands.
    listed = cli("--help").stdout
    assert all(name in listed for name in ("alerts", "ack", "log", "shelve", "streams"))


# -- control characters in stream ids ----------------------------------------------------------

HOSTILE = "kiln-9\x1b[2J\x07/temp\nFORGED LINE"
CONTROL = set(map(chr, [*range(0x20), 0x7F]))


def test_streams_and_alerts_escape_control_characters_in_stream_ids(tmp_path: Path) -> None:
    # A gateway names the stream: ESC would drive the operator's terminal, BEL ring it, and a
    # newline forge a row of the table.
    plant = Plant(tmp_path / "hostile.db", base=time.time() - 3600)
    rng = np.random.default_rng(7)
    values = [round(float(v), 2) for v in rng.normal(50.0, 1.0, 30)]
    values[28] = 80.0
    with open_store(plant.path, now=plant.base) as store:
        _feed(plant, store, AlertBook(store, POLICY), HOSTILE, values, {28: ["beyond-limits"]})
    for command in (["streams"], ["alerts"], ["alerts", "--state", "all"]):
        result = plant.cli(*command)
        assert result.returncode == 0, result.stderr
        body = result.stdout.replace("\n", "")
        assert not (set(body) & CONTROL), (command, result.stdout)
        assert "kiln-9\\x1b[2J\\x07" in result.stdout
        assert not any(line.startswith("FORGED") for line in result.stdout.splitlines())
    alert_id = plant.json("alerts")[0]["id"]
    assert plant.json("alerts")[0]["stream"] == HOSTILE  # machine output keeps the real id
    for command in (["log", str(alert_id)], ["ack", str(alert_id), "--by", "night shift"]):
        result = plant.cli(*command)
        assert result.returncode == 0, result.stderr
        assert not (set(result.stdout.replace("\n", "")) & CONTROL), (command, result.stdout)


# -- acknowledging and shelving at an operator's speed --------------------------------------------


def test_ack_takes_several_ids_and_reports_each(plant: Plant) -> None:
    kiln, long = alert_id(plant, KILN, "trend"), alert_id(plant, LONG, "four-of-five-zone-b")
    result = plant.cli("ack", str(kiln), str(long), "--by", "dana", "--note", "walkround")
    assert result.returncode == 0, result.stderr
    acked = {a["id"]: a for a in plant.json("alerts", "--state", "acknowledged")}
    assert set(acked) == {kiln, long}
    assert {a["ack_note"] for a in acked.values()} == {"walkround"}
    # Again, with a cleared one among them: each is named in the error, and nothing changes.
    press = alert_id(plant, PRESS, "run-one-side")
    again = plant.cli("ack", str(kiln), str(press), "--by", "lee")
    assert again.returncode == 1
    assert "already acknowledged by dana" in again.stderr and "already cleared" in again.stderr
    assert plant.json("alerts", "--state", "acknowledged")[0]["acknowledged_by"] == "dana"


def test_ack_by_stream_glob_takes_every_open_incident_of_those_streams(plant: Plant) -> None:
    result = plant.cli("ack", "--stream", "comp-*", "--by", "dana")
    assert result.returncode == 0, result.stderr
    (acked,) = plant.json("alerts", "--state", "acknowledged")
    assert acked["stream"] == LONG
    assert [a["stream"] for a in plant.json("alerts", "--state", "open")] == [KILN]
    none = plant.cli("ack", "--stream", "comp-*", "--by", "dana")
    assert none.returncode == 0 and "No open incidents" in none.stdout


def test_ack_all_open_asks_first_unless_yes(plant: Plant) -> None:
    refused = subprocess.run(
        [str(CLI), "ack", "--all-open", "--by", "dana", "--db", str(plant.path)],
        input="n\n",
        capture_output=True,
        text=True,
        check=False,
    )
    assert refused.returncode == 1 and "2 open incident(s)" in refused.stdout
    assert len(plant.json("alerts", "--state", "open")) == 2
    done = plant.cli("ack", "--all-open", "--yes", "--by", "dana")
    assert done.returncode == 0, done.stderr
    assert plant.json("alerts", "--state", "open") == []
    assert plant.cli("ack", "--by", "dana").returncode == 2  # nothing named


def test_shelve_by_glob_lists_and_records_the_streams_and_refuses_too_long(plant: Plant) -> None:
    too_long = plant.cli("shelve", "*", "--for", "8d", "--reason", "shutdown")
    assert too_long.returncode == 1 and "longer than the maximum of 7d" in too_long.stderr
    assert all(s["shelves"] == [] for s in plant.json("streams"))
    forced = plant.cli("shelve", "*temp*", "--for", "8d", "--reason", "shutdown", "--force")
    assert forced.returncode == 0, forced.stderr
    assert "Streams covered (2):" in forced.stdout
    assert f"  {KILN}" in forced.stdout and f"  {LONG}" in forced.stdout
    with open_store(plant.path) as store:
        shelves = store.active_shelves(time.time())
    assert {(s.stream, s.pattern) for s in shelves} == {(KILN, "*temp*"), (LONG, "*temp*")}
    # A second shelf over the same streams replaces the first, and says which way it goes.
    shorter = plant.cli("shelve", KILN, "--for", "2h", "--reason", "back early", "--by", "sam")
    assert shorter.returncode == 0, shorter.stderr
    assert "replaces the shelf" in shorter.stdout and "shortens it" in shorter.stdout
    (kiln_shelf,) = _stream(plant, KILN)["shelves"]
    assert kiln_shelf["reason"] == "back early"
    longer = plant.cli("shelve", KILN, "--for", "3h", "--reason", "not yet", "--by", "sam")
    assert "extends it" in longer.stdout
    # A config can set a different maximum.
    config = plant.folder / "site.toml"
    config.write_text(
        f'[store]\npath = "{plant.store_value}"\n[alerts]\nmax_shelf = "1h"\n', encoding="utf-8"
    )
    capped = cli("shelve", OVEN, "--for", "2h", "--reason", "x", "--config", str(config))
    assert capped.returncode == 1 and "maximum of 1h" in capped.stderr
    ended = plant.cli("unshelve", "*temp*", "--by", "sam")
    assert ended.returncode == 0, ended.stderr
    assert KILN in ended.stdout and LONG in ended.stdout
    assert all(s["shelves"] == [] for s in plant.json("streams"))


def test_with_a_config_the_tables_name_each_streams_unit_and_description(plant: Plant) -> None:
    config = plant.folder / "site.toml"
    config.write_text(
        f'[store]\npath = "{plant.store_value}"\n'
        f'[[streams]]\nmatch = "{KILN}"\ndescription = "kiln 2 crown temperature"\n'
        'unit = "degC"\n',
        encoding="utf-8",
    )
    number = alert_id(plant, KILN, "beyond-limits")
    log = cli("log", str(number), "--config", str(config))
    assert log.returncode == 0, log.stderr
    flat = " ".join(log.stdout.split())
    assert f"{KILN} (kiln 2 crown temperature)" in flat
    assert f"{plant.values[KILN][44]:.5g} degC" in flat
    listed = cli("alerts", "--config", str(config))
    kiln_row = next(line for line in listed.stdout.splitlines() if KILN in line)
    assert kiln_row.rstrip().endswith("degC")
    long_row = next(line for line in listed.stdout.splitlines() if "comp-a/" in line)
    assert "degC" not in long_row  # no unit configured for that stream
