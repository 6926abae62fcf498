"""`check` never passes what `serve` refuses, and never answers with a traceback or a hang.

The regression cases are inputs that once made `check` crash or run for minutes, or passed
`check` and then crashed `serve` at start; they go through the installed CLI, as a user runs it.
The property test mutates a valid config key by key and asserts that `check` either names the
fault by key path or the config builds everything `serve` builds at start: the settings and
detectors of every stream, the typed baselines, the alert policy, each notifier's settings and
the scheduler's jobs with their first run times (nothing network-facing is started).
"""

from __future__ import annotations

import json
import math
import re
import tempfile
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from limitwatch.alerts.notifiers.registry import settings_model
from limitwatch.cli import main
from limitwatch.config import load_config
from limitwatch.service import Service
from limitwatch.stats.rules import build_detectors, parse_rules
from tests.helpers import run_cli


def toml_value(value: Any) -> str:
    """A TOML inline value (tables inline, so one writer covers every shape used here)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=True)  # \uXXXX escapes are TOML too
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{json.dumps(k)} = {toml_value(v)}" for k, v in value.items()) + "}"
    raise TypeError(value)


def write_toml(path: Path, data: dict[str, Any]) -> Path:
    path.write_text("".join(f"{k} = {toml_value(v)}\n" for k, v in data.items()))
    return path


def base_config(folder: Path) -> dict[str, Any]:
    return {
        "store": {"path": str(folder / "plant.db")},
        "service": {"stale_check_every": "1m", "alert_tick_every": "30s"},
        "defaults": {"rules": "limits", "learn_count": 20, "cadence": "1m"},
        "streams": [
            {"match": "kiln-*/temp", "cadence": "5m", "lower_bound": 0},
            {"match": "pack-2/downtime", "baseline": {"center": 10.0, "sigma": 2.0}},
        ],
        "alerts": {"repeat_every": "1h", "escalate_after": "off"},
        "sources": [
            {
                "type": "file",
                "name": "export",
                "glob": str(folder / "*.csv"),
                "format": "csv",
                "value": "value",
                "time": "time",
                "stream": "stream",
                "poll_every": "5s",
            }
        ],
        "notifiers": [{"type": "console", "name": "desk"}],
    }


def check(path: Path) -> tuple[int, str]:
    result = CliRunner().invoke(main, ["check", "--config", str(path)])
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception  # a traceback is the failure this file is about
    return result.exit_code, result.output


def builds_what_serve_builds(path: Path) -> None:
    """What `Service.start` builds before it touches the network or the store."""
    config = load_config(path)
    now = datetime.now(UTC)
    entries = [config.default_settings()] + [
        config.entry_settings(i) for i in range(len(config.streams))
    ]
    for entry in entries:
        entry.monitor_settings()
        build_detectors(parse_rules(entry.rules))
        baseline = entry.typed_baseline()
        if baseline is not None:
            assert math.isfinite(baseline.ucl) and baseline.ucl > baseline.center
        if entry.stale_after_s is not None:
            assert math.isfinite(entry.stale_after_s)
    config.alert_policy()
    for table in config.notifiers:
        settings_model(table["type"]).model_validate(table)
    if config.service.metrics_listen:
        config.service.metrics_address  # noqa: B018 -- parsing is the check
    scheduler = Service(config)._make_scheduler()
    jobs = scheduler.get_jobs()
    assert {"stale-check", "alert-tick", "refits"} <= {job.id for job in jobs}
    for job in jobs:
        first = job.trigger.get_next_fire_time(None, now)
        assert first is not None
        job.trigger.get_next_fire_time(first, first)  # the second run is reachable too


# --------------------------------------------------------------------------- regressions

DEEP = "deep = " + "[" * 500 + "]" * 500 + "\n"

REGRESSIONS = [
    pytest.param(DEEP, "nested too deeply", id="toml-nested-500"),
    pytest.param('[store]\npath = "~nosuchuser/x.db"\n', "store.path", id="unknown-user"),
    pytest.param('[defaults]\ncadence = "1e308"\n', "defaults.cadence", id="cadence-1e308"),
    pytest.param(
        '[[notifiers]]\ntype = "webhook"\nname = "w"\nurl = "http://127.0.0.1:9/"\n'
        'secret_file = "/tmp/a\\u0000b"\n',
        "notifiers[0].secret_file",
        id="nul-in-secret-path",
    ),
    pytest.param(
        '[defaults]\nrules = "run-one-side(length=100000000)"\ncadence = "1m"\n',
        "defaults.rules",
        id="run-length-1e8",
    ),
    pytest.param(
        '[service]\nstale_check_every = "1e308"\n', "service.stale_check_every", id="stale-1e308"
    ),
    pytest.param(
        '[service]\nstale_check_every = "99999999999w"\n',
        "service.stale_check_every",
        id="stale-weeks",
    ),
    pytest.param(
        '[service]\nrefit_check_every = "1e308"\n', "service.refit_check_every", id="refit-1e308"
    ),
    pytest.param(
        '[service]\nrefit_check_every = "99999999999w"\n',
        "service.refit_check_every",
        id="refit-weeks",
    ),
    pytest.param(
        '[service]\nalert_tick_every = "1e12"\n', "service.alert_tick_every", id="tick-1e12"
    ),
    pytest.param(
        '[[sources]]\ntype = "file"\nname = "f"\nglob = "*.csv"\nformat = "csv"\n'
        'value = "v"\ntime = "t"\nstream_fixed = "s"\npoll_every = "1e308"\n',
        "sources[0].poll_every",
        id="poll-1e308",
    ),
    pytest.param(
        '[[sources]]\ntype = "file"\nname = "f"\nglob = "*.csv"\nformat = "csv"\n'
        'value = "v"\ntime = "t"\nstream_fixed = "s"\npoll_every = "99999999999w"\n',
        "sources[0].poll_every",
        id="poll-weeks",
    ),
]


@pytest.mark.parametrize(("text", "where"), REGRESSIONS)
def test_check_names_the_key_instead_of_crashing(tmp_path: Path, text: str, where: str) -> None:
    path = tmp_path / "site.toml"
    path.write_text(f'[store]\npath = "{tmp_path / "x.db"}"\n' * ("[store]" not in text) + text)
    done = run_cli("check", "--config", str(path))
    assert done.returncode == 1, done.stdout + done.stderr
    assert "Traceback" not in done.stderr
    assert where in done.stderr


@pytest.mark.parametrize(
    ("key", "text"),
    [
        ("stale_check_every", "366d"),
        ("refit_check_every", "366d"),
        ("alert_tick_every", "366d"),
    ],
)
def test_the_longest_accepted_interval_still_schedules(tmp_path, key, text) -> None:
    data = base_config(tmp_path)
    data["service"][key] = text
    path = write_toml(tmp_path / "site.toml", data)
    code, output = check(path)
    assert code == 0, output
    builds_what_serve_builds(path)


# --------------------------------------------------------------------------- property

DURATION_KEYS = [
    ("service", "batch_wait"),
    ("service", "stale_check_every"),
    ("service", "alert_tick_every"),
    ("service", "refit_check_every"),
    ("service", "stall_after"),
    ("store", "keep_readings_for"),
    ("defaults", "cadence"),
    ("defaults", "max_gap"),
    ("alerts", "repeat_every"),
    ("alerts", "escalate_after"),
    ("alerts", "give_up_after"),
    ("sources", 0, "poll_every"),
    ("streams", 0, "cadence"),
]
NUMBER_KEYS = [
    ("defaults", "learn_count"),
    ("defaults", "min_points"),
    ("defaults", "warn_points"),
    ("defaults", "stale_after"),
    ("defaults", "lower_bound"),
    ("defaults", "autocorrelation_threshold"),
    ("alerts", "clear_after"),
    ("service", "batch_max"),
    ("store", "keep_readings_per_stream"),
    ("streams", 1, "baseline", "center"),
    ("streams", 1, "baseline", "sigma"),
    ("streams", 0, "lower_bound"),
]
PATH_KEYS = [("store", "path"), ("sources", 0, "glob")]
RULE_KEYS = [("defaults", "rules"), ("streams", 0, "rules")]

big_numbers = st.one_of(
    st.integers(min_value=-(10**20), max_value=10**20),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0, 1, -1, 1e308, 5e-324, 1e-9, 2**63, 1e15]),
)
duration_texts = st.one_of(
    st.sampled_from(
        ["1e308", "99999999999w", "1e12", "0", "-1", "1e-9", "0.0001", "366d", "367d", "1h30m"]
    ),
    st.builds(lambda n, u: f"{n}{u}", st.integers(0, 10**15), st.sampled_from(["ms", "s", "w"])),
    big_numbers,
)
rule_texts = st.one_of(
    st.builds(
        "{}(length={})".format,
        st.sampled_from(["run-one-side", "hugging-center", "avoiding-center"]),
        st.integers(-5, 10**9),
    ),
    st.builds("beyond-limits(k={})".format, st.sampled_from(["0", "1e308", "1e-300", "inf", "3"])),
    st.builds(
        "four-of-five-zone-b(count={}, window={})".format, st.integers(0, 12), st.integers(0, 70)
    ),
    st.builds(
        "ewma(lam={}, L={})".format, st.sampled_from(["0", "1e-9", "0.2", "2"]), st.just("3")
    ),
    st.builds("cusum(h={}, k={})".format, st.sampled_from(["1e308", "4", "0"]), st.just("0.5")),
    st.sampled_from(["limits", "nelson", "", "nope", "limits,"]),
)
path_texts = st.sampled_from(
    ["~nosuchuser/x.db", "a\x00b", "~/x.db", "", "/", "relative/x.db", "/dev/null/x.db"]
)
mutation = st.one_of(
    st.tuples(st.sampled_from(DURATION_KEYS), duration_texts),
    st.tuples(st.sampled_from(NUMBER_KEYS), big_numbers),
    st.tuples(st.sampled_from(PATH_KEYS), path_texts),
    st.tuples(st.sampled_from(RULE_KEYS), rule_texts),
)


def mutate(data: dict[str, Any], key: tuple[Any, ...], value: Any) -> None:
    *parents, last = key
    table: Any = data
    for part in parents:
        table = table[part] if isinstance(part, int) else table.setdefault(part, {})
    table[last] = value


PROBLEM = re.compile(r"^  (?:[a-z_]+(?:\[\d+\])?)(?:\.[a-z_]+(?:\[\d+\])?)*: ", re.M)


@settings(
    max_examples=150,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow],
)
@given(st.lists(mutation, min_size=1, max_size=3))
def test_check_reports_by_key_path_or_the_config_builds_what_serve_builds(mutations) -> None:
    with tempfile.TemporaryDirectory() as folder:
        data = base_config(Path(folder))
        for key, value in mutations:
            mutate(data, key, value)
        path = write_toml(Path(folder) / "site.toml", data)
        code, output = check(path)
        if code == 0:
            builds_what_serve_builds(path)
        else:
            assert code == 1, output
            assert PROBLEM.search(output) or "not valid TOML" in output, output
