"""Durations say their unit: a bare number in a duration key (read as seconds) is warned about by
`check` and at start-up, `stale_after` given a duration says it counts cadences, and `replay
--max-gap` takes durations as the config does. Through the installed console script."""

from __future__ import annotations

import json

from limitwatch.config.units import bare_durations, duration_keys
from tests.helpers import run_cli, write_csv

CONFIG = """
[store]
path = "lw.db"

[service]
batch_wait = {batch_wait}
stall_after = "1m"

[defaults]
cadence = "1m"
stale_after = {stale_after}

[[sources]]
type = "file"
name = "export"
glob = "data/*.csv"
format = "csv"
poll_every = 5
value = "value"
time = "time"
stream_fixed = "oven-1/energy"
"""


def write(tmp_path, batch_wait="50", stale_after="5"):
    path = tmp_path / "site.toml"
    path.write_text(CONFIG.format(batch_wait=batch_wait, stale_after=stale_after))
    return path


def test_check_warns_about_each_duration_without_a_unit(tmp_path):
    result = run_cli("check", "--config", str(write(tmp_path)), "--file-only")
    assert result.returncode == 0, result.stderr
    warned = [line for line in result.stdout.splitlines() if "has no unit" in line]
    assert len(warned) == 2, result.stdout
    assert "service.batch_wait = 50 has no unit and is read as 50 seconds" in warned[0]
    assert 'sources[0].poll_every = 5 has no unit' in warned[1]
    quiet = run_cli("check", "--config", str(write(tmp_path, '"50ms"')), "--file-only")
    assert "service.batch_wait" not in quiet.stdout


def test_every_duration_key_is_known_and_no_count_is_taken_for_one():
    keys = duration_keys()
    assert {"batch_wait", "cadence", "max_gap", "poll_every", "repeat_every"} <= keys
    assert not {"stale_after", "batch_max", "keepalive_s", "learn_count"} & keys
    assert bare_durations({"defaults": {"stale_after": 5, "learn_count": 30}}) == []


def test_stale_after_given_a_duration_says_it_counts_cadences(tmp_path):
    result = run_cli("check", "--config", str(write(tmp_path, '"50ms"', '"10m"')), "--file-only")
    assert result.returncode == 1
    assert "defaults.stale_after" in result.stderr and "counts cadences" in result.stderr


def test_replay_max_gap_takes_a_duration_or_seconds(tmp_path):
    rows = [[i * 60 + (3600 if i >= 30 else 0), 10 + (i % 3) * 0.5] for i in range(40)]
    rows[34][1] = 12.0
    path = write_csv(tmp_path / "t.csv", ["t", "v"], rows)
    outputs = []
    for gap in ("15m", "900", "900s"):
        result = run_cli(
            "replay", str(path), "--value", "v", "--time", "t", "--baseline-first", "20",
            "--max-gap", gap, "--format", "jsonl",
        )
        assert result.returncode == 0, result.stderr
        outputs.append([json.loads(line) for line in result.stdout.splitlines()])
    assert outputs[0] == outputs[1] == outputs[2]
    bad = run_cli("replay", str(path), "--value", "v", "--max-gap", "15 minutes")
    assert bad.returncode == 2 and "--max-gap" in bad.stderr
