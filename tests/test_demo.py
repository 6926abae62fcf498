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


def alerts_by_stream(db: Path) -> dict[str, set[str]]:
    conn = sqlite3.connect(db)
    try:
        rows = conn.execute("SELECT stream, rule FROM alerts").fetchall()
    finally:
        conn.close()
    out: dict[str, set[str]] = {}
    for stream, rule in rows:
        out.setdefault(stream, set()).add(rule)
    return out


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
    found = alerts_by_stream(folder / "quillmoor.db")
    for spec in STREAMS:
        rules = found.get(spec.stream, set())
        allowed = EXPECTED[spec.injected]
        assert rules <= allowed, (spec.stream, rules)
        if allowed:
            assert rules, f"{spec.stream}: the injected {spec.injected} raised no alert"
    out = result.stdout
    assert "not a safety system" in out
    assert f"Everything is in {folder}" in out
    assert "pack-1/downtime          no alert" in out
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
