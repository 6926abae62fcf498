"""`limitwatch demo` end to end: the injected causes, and only they, raise alerts."""

from __future__ import annotations

import os
import shlex
import shutil
import sqlite3
import subprocess
import tomllib
from pathlib import Path

import pytest
from click.testing import CliRunner

from limitwatch import demo_folder
from limitwatch.cli import main
from limitwatch.cli.demo import command_prefix, demo_config_text
from limitwatch.demo import STREAMS
from limitwatch.store import Store
from tests.broker import mosquitto_path
from tests.helpers import CLI, run_cli

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


@pytest.mark.parametrize("transport", ["file", "mqtt", "sparkplug"])
def test_demo_raises_alerts_for_the_injected_causes_and_nothing_else(tmp_path, transport):
    if transport != "file" and mosquitto_path() is None:
        if os.environ.get("CI") == "true":
            pytest.fail("mosquitto is not installed, and CI needs it")
        pytest.skip("mosquitto is not installed")
    folder = tmp_path / "demo"
    args = ["demo", "--folder", str(folder), "--pace", "0"]
    if transport != "file":
        args.append(f"--{transport}")
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
    # the commands it suggests work as printed, from a shell whose PATH lacks the venv (the
    # README installs without activating it)
    suggested = next_commands(out)
    assert len(suggested) == 6
    alerts_line = next(args for args in suggested if args[1] == "alerts")
    path = os.pathsep.join(
        d for d in os.environ.get("PATH", "").split(os.pathsep) if Path(d) != CLI.parent
    )
    listed = subprocess.run(
        alerts_line, capture_output=True, text=True, env={**os.environ, "PATH": path}, timeout=60
    )
    assert listed.returncode == 0 and "pack-2/downtime" in listed.stdout
    if transport == "sparkplug":
        assert_sparkplug_story(folder, out)


def assert_sparkplug_story(folder: Path, out: str) -> None:
    """The readings came as Sparkplug B births and data by alias, pack-3's device died right
    after its last reading, and its stale incident says so."""
    assert "Sparkplug B edge node quillmoor/site-gateway" in out
    words = " ".join(out.split())  # the notice wraps its lines
    assert "the device quillmoor/site-gateway/pack-3 reported offline (DDEATH)" in words
    config = (folder / "demo.toml").read_text()
    assert 'type = "sparkplug"' in config and 'type = "file"' not in config
    conn = sqlite3.connect(folder / "quillmoor.db")
    try:
        letters = conn.execute("SELECT source, reason FROM dead_letters").fetchall()
        (opened,) = conn.execute(
            "SELECT a.id FROM alerts a WHERE a.stream = 'pack-3/downtime' AND a.rule = 'stale'"
        ).fetchall()
    finally:
        conn.close()
    # the one refusal is the death itself, kept so that it is seen and counted
    assert [(s, r.split(":")[0]) for s, r in letters] == [
        ("quillmoor-edge", "device-offline")
    ], letters
    assert "device quillmoor/site-gateway/pack-3 reported offline (DDEATH)" in letters[0][1]
    assert opened
    assert (folder / "quillmoor.db.source-quillmoor-edge.json").is_file()  # the births kept


def next_commands(out: str) -> list[list[str]]:
    """The commands under the demo's "Next, try:" line, split as a shell would."""
    tail = out.split("Next, try:\n", 1)[1]
    return [shlex.split(line) for line in tail.splitlines() if line.startswith("  ")]


def test_packaged_demo_config_is_the_one_in_config_folder():
    assert demo_config_text() == (Path(__file__).parents[1] / "config" / "demo.toml").read_text()


def demo(folder: Path) -> tuple[int, str]:
    result = CliRunner().invoke(main, ["demo", "--folder", str(folder), "--pace", "0"])
    return result.exit_code, result.output


def test_demo_refuses_to_delete_a_folder_it_did_not_make(tmp_path):
    (tmp_path / "precious.txt").write_text("keep me")
    code, out = demo(tmp_path)
    assert code == 1 and "not a limitwatch demo folder" in out and str(tmp_path) in out
    assert (tmp_path / "precious.txt").read_text() == "keep me"
    assert not (tmp_path / demo_folder.MARKER).exists()


def test_demo_refuses_a_config_folder_that_merely_holds_a_demo_toml(tmp_path):
    """Issue 14: `limitwatch demo --folder config` in a checkout deleted config/example.toml."""
    config = tmp_path / "config"
    config.mkdir()
    (config / "demo.toml").write_text(demo_config_text())
    (config / "example.toml").write_text("# a site's config\n")
    code, out = demo(config)
    assert code == 1 and f"{config} is not a limitwatch demo folder" in out
    assert sorted(p.name for p in config.iterdir()) == ["demo.toml", "example.toml"]
    assert (config / "example.toml").read_text() == "# a site's config\n"


def test_demo_writes_into_an_empty_folder_and_marks_it(tmp_path):
    assert demo_folder.prepare(tmp_path, demo_config_text()) is None
    assert (tmp_path / demo_folder.MARKER).is_file() and (tmp_path / "data").is_dir()


def test_demo_again_replaces_only_its_own_files_and_says_what_went(tmp_path):
    folder = tmp_path / "demo"
    code, out = demo(folder)
    assert code == 0, out
    assert "Replacing" not in out
    store = Store.open(folder / "quillmoor.db", now=0.0)
    try:
        store.acknowledge(1, by="tester", note="seen", now=1.0)
        alerts = len(store.alerts())
    finally:
        store.close()
    (folder / "notes.txt").write_text("mine")
    (folder / "data" / "site.txt").write_text("mine too")

    code, out = demo(folder)
    assert code == 0, out
    assert (
        f"Replacing the earlier demo in {folder}: its database ({alerts} alerts, 1 acknowledged, "
        "0 refitted baselines)" in out
    )
    assert "Kept, as the demo did not make them: notes.txt, data/site.txt." in out
    assert (folder / "notes.txt").read_text() == "mine"
    assert (folder / "data" / "site.txt").read_text() == "mine too"
    fresh = sqlite3.connect(folder / "quillmoor.db")
    try:
        assert fresh.execute("SELECT count(acknowledged_at) FROM alerts").fetchone() == (0,)
    finally:
        fresh.close()


def test_demo_files_name_the_database_of_the_demo_config():
    files = demo_folder.demo_files(demo_config_text())
    assert "quillmoor.db" in files
    # the births file the Sparkplug source keeps beside the database goes with a rerun too
    assert "quillmoor.db.source-quillmoor-edge.json" in files


def test_next_commands_name_the_script_by_path_unless_path_finds_it(tmp_path):
    script = tmp_path / "venv bin" / "limitwatch"
    script.parent.mkdir()
    script.write_text("#!/bin/sh\n")
    assert command_prefix(str(script), which=lambda _: None) == shlex.quote(str(script))
    assert command_prefix(str(script), which=lambda _: str(script)) == "limitwatch"
    elsewhere = shutil.which("sh") or "/bin/sh"
    assert command_prefix(str(script), which=lambda _: elsewhere) == shlex.quote(str(script))
    # run as `python -m limitwatch` (argv[0] is __main__.py) with no script beside python
    python = str(tmp_path / "python3")
    assert command_prefix("/x/__main__.py", python=python) == f"{python} -m limitwatch"
    # ... or with one: the script beside the interpreter, as the venv has it
    assert command_prefix("-c", python=str(script.with_name("python3")), which=lambda _: None) == (
        shlex.quote(str(script))
    )


@pytest.mark.parametrize("flag", ["--mqtt", "--sparkplug"])
def test_a_broker_demo_without_mosquitto_says_what_to_install(tmp_path, monkeypatch, flag):
    monkeypatch.setattr("limitwatch.cli.demo.mosquitto_path", lambda: None)
    folder = tmp_path / "demo"
    result = CliRunner().invoke(main, ["demo", flag, "--folder", str(folder)])
    assert result.exit_code == 1
    assert f"{flag} needs Mosquitto on this machine" in result.output
    assert "apt-get install mosquitto" in result.output
    assert not folder.exists()  # nothing written before the refusal


def test_the_demo_takes_one_broker_transport_at_a_time(tmp_path):
    result = CliRunner().invoke(
        main, ["demo", "--mqtt", "--sparkplug", "--folder", str(tmp_path / "demo")]
    )
    assert result.exit_code == 2 and "choose one of --mqtt and --sparkplug" in result.output


def test_the_sparkplug_gateway_gives_each_demo_stream_a_device_metric_and_alias():
    from limitwatch.cli.demo import _with_source
    from limitwatch.config import config_from_dict
    from limitwatch.demo_sparkplug import device_metrics, source_config

    devices = device_metrics()
    pairs = {f"{d}/{m}": a for d, names in devices.items() for m, a in names.items()}
    assert sorted(pairs) == sorted(s.stream for s in STREAMS)
    assert sorted(pairs.values()) == list(range(1, len(STREAMS) + 1))  # unique aliases
    config = config_from_dict(tomllib.loads(_with_source(source_config(1883))))
    (source,) = config.sources
    # the template gives back the demo's own stream ids, so its [[streams]] apply unchanged
    assert {source.stream_for("quillmoor", "site-gateway", d, m) for d, m in
            (p.split("/", 1) for p in pairs)} == set(pairs)  # fmt: skip
