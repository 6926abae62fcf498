"""`limitwatch demo` end to end: the injected causes, and only they, raise alerts."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest

from limitwatch.cli_demo import demo_config_text
from limitwatch.demo import STREAMS
from tests.broker import mosquitto_path
from tests.helpers import run_cli

# What each injected cause may legitimately raise (any of these rules, at least one of them).
EXPECTED = {
    "sustained shift": {
        "beyond-limits",
        "two-of-three-zone-a",
        "four-of-five-zone-b",
        "run-one-side",
        "mr-beyond-limit",
    },
    "slow drift": {
        "beyond-limits",
        "two-of-three-zone-a",
        "four-of-five-zone-b",
        "run-one-side",
        "mr-beyond-limit",
    },
    "one wild reading": {"beyond-limits", "mr-beyond-limit"},
    "stops reporting": {"stale"},
    None: set(),
}


def incidents_by_stream(db: Path) -> dict[str, list[set[str]]]:
    """Each stream's incidents, oldest first, as the set of rules that joined each."""
    conn = sqlite3.connect(db)
    try:
        rows = conn.execute(
            """SELECT a.stream, a.id, r.rule FROM alerts a JOIN incident_rules r
            ON r.alert_id = a.id ORDER BY a.id"""
        ).fetchall()
    finally:
        conn.close()
    found: dict[str, dict[int, set[str]]] = {}
    for stream, alert_id, rule in rows:
        found.setdefault(stream, {}).setdefault(alert_id, set()).add(rule)
    return {stream: list(incidents.values()) for stream, incidents in found.items()}


@pytest.mark.parametrize("transport", ["file", "mqtt"])
def test_demo_raises_alerts_for_the_injected_causes_and_nothing_else(tmp_path, transport):
    if transport == "mqtt" and mosquitto_path() is None:
        pytest.skip("mosquitto is not installed")
    folder = tmp_path / "demo"
    args = ["demo", "--folder", str(folder), "--pace", "0"]
    if transport == "mqtt":
        args.append("--mqtt")
    result = run_cli(*args)
    assert result.returncode == 0, result.stderr
    found = incidents_by_stream(folder / "quillmoor.db")
    for spec in STREAMS:
        incidents = found.get(spec.stream, [])
        allowed = EXPECTED[spec.injected]
        if not allowed:
            assert incidents == [], (spec.stream, incidents)
            continue
        # One cause, one incident, however many rules it made fire.
        (rules,) = incidents
        assert rules and rules <= allowed, (spec.stream, rules)
    assert len(STREAMS) == 5 and sum(len(i) for i in found.values()) == 4
    out = result.stdout
    assert "not a safety system" in out
    assert f"Everything is in {folder}" in out
    assert "4 incident(s), one per cause" in out
    assert "pack-1/downtime          no incident" in out
    # Every notification names the stream's unit and description.
    assert "unit:         min" in out and "(unplanned downtime per shift)" in out
    # the commands it suggests work on what it left behind
    listed = run_cli("alerts", "--db", str(folder / "quillmoor.db"))
    assert listed.returncode == 0 and "pack-2/downtime" in listed.stdout


def test_packaged_demo_config_is_the_one_in_config_folder():
    assert demo_config_text() == (Path(__file__).parents[1] / "config" / "demo.toml").read_text()


def test_demo_refuses_to_delete_a_folder_it_did_not_make(tmp_path):
    (tmp_path / "precious.txt").write_text("keep me")
    result = run_cli("demo", "--folder", str(tmp_path), "--pace", "0")
    assert result.returncode != 0 and "not a limitwatch demo folder" in result.stderr
    assert (tmp_path / "precious.txt").read_text() == "keep me"
