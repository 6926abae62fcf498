"""The TOML configuration (limitwatch.config), durations, and ``limitwatch check``.

External references: d2 = 1.128 for moving ranges of two is Montgomery, *Introduction to
Statistical Quality Control*, Appendix VI (n = 2); MQTT 3.1.1 (OASIS 2014) section 3.1.2.9 says
a password is sent only with a user name, and MQTT 5.0 section 3.1.2.11.2 makes the session
expiry interval a four-byte integer of seconds (both cited from memory). Duration arithmetic
is checked against plain multiplication (1 h = 3600 s, 1 d = 86400 s, 1 w = 604800 s).
"""

from __future__ import annotations

import os
import typing
from pathlib import Path
from types import UnionType
from typing import Annotated, Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import BaseModel

from limitwatch import demo
from limitwatch.alerts.notifiers.registry import known_types, settings_model
from limitwatch.config import (
    Config,
    ConfigError,
    FileSourceConfig,
    MqttSourceConfig,
    SourceSettings,
    check_files,
    check_secrets,
    config_from_dict,
    load_config,
)
from limitwatch.durations import DurationError, format_duration, parse_duration
from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.model import Reading
from tests.helpers import cli, examples

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "config" / "example.toml"
DEMO = ROOT / "config" / "demo.toml"


def problems(data: dict[str, Any], base_dir: Path | None = None) -> dict[str, str]:
    """Key path -> message of every problem in ``data`` (which must be invalid)."""
    with pytest.raises(ConfigError) as info:
        config_from_dict(data, base_dir=base_dir)
    found = {p.path: p.message for p in info.value.problems}
    assert len(found) == len(info.value.problems), "a key path was reported twice"
    return found


def mqtt(**overrides: Any) -> dict[str, Any]:
    source = {
        "type": "mqtt",
        "name": "plant",
        "host": "broker.quillmoor.example",
        "client_id": "lw-1",
        "topics": [{"filter": "quillmoor/+/+", "stream": "{2}/{3}", "payload": "number"}],
    }
    source.update(overrides)
    return source


def file_source(**overrides: Any) -> dict[str, Any]:
    source = {
        "type": "file",
        "name": "export",
        "glob": "data/*.csv",
        "format": "csv",
        "value": "value",
        "time": "time",
        "stream": "stream",
    }
    source.update(overrides)
    return source


# =============================================================================== durations


@pytest.mark.parametrize(
    ("text", "seconds"),
    [
        ("250ms", 0.25),
        ("90s", 90.0),
        ("15m", 15 * 60.0),
        ("8h", 8 * 3600.0),
        ("30d", 30 * 86400.0),
        ("2w", 2 * 604800.0),
        ("1h30m", 3600.0 + 30 * 60.0),
        ("1d 6h", 86400.0 + 6 * 3600.0),
        ("1.5h", 1.5 * 3600.0),
        ("1m0.5s", 60.5),
        ("90", 90.0),
        (" 2.5 ", 2.5),
        (90, 90.0),
        (0.25, 0.25),
        (0, 0.0),
    ],
)
def test_durations_are_read(text, seconds):
    assert parse_duration(text) == pytest.approx(seconds, abs=1e-12)


@pytest.mark.parametrize(
    ("text", "complaint"),
    [
        ("30x", "250ms"),  # the hint shows what works
        ("30m1h", "largest unit first"),
        ("1h1h", "'h' twice"),
        ("-5s", "negative"),
        (-5, "negative"),
        ("", "empty"),
        ("1H", "250ms"),  # upper case is not a unit (M could be months)
        ("h", "250ms"),
        (True, "not a duration"),
        (float("inf"), "finite"),
        ("1e999", "finite"),
    ],
)
def test_bad_durations_quote_the_text(text, complaint):
    with pytest.raises(DurationError) as info:
        parse_duration(text)
    message = str(info.value)
    assert complaint in message
    if isinstance(text, str) and text:
        assert repr(text) in message


@pytest.mark.parametrize(
    ("seconds", "text"),
    [(0.25, "250ms"), (90, "1m30s"), (5400, "1h30m"), (28800, "8h"), (2592000, "30d"), (0, "0s")],
)
def test_durations_are_shown_compactly(seconds, text):
    assert format_duration(seconds) == text
    assert format_duration(None) == "off"


@settings(max_examples=examples(300), deadline=None)
@given(st.integers(min_value=0, max_value=10 * 365 * 86400 * 1000))
def test_shown_durations_read_back_to_the_same_seconds(milliseconds):
    seconds = milliseconds / 1000.0
    assert parse_duration(format_duration(seconds)) == pytest.approx(seconds, abs=1e-6)


# =============================================================================== loading


def test_an_empty_file_is_a_working_config_of_defaults(tmp_path):
    path = tmp_path / "site" / "empty.toml"
    path.parent.mkdir()
    path.write_text("")
    config = load_config(path)
    assert config.path == path
    assert config.store.path == path.parent.resolve() / "limitwatch.db"
    assert config.service.batch_wait == 0.2
    assert config.service.batch_max == 500 and config.service.metrics_address is None
    # With no [[streams]] entries every stream gets the engine's own defaults.
    assert config.stream_settings("any/stream").monitor_settings() == MonitorSettings()
    assert config.sources == [] and config.warnings()[0].path == "sources"


def test_a_missing_file_a_folder_and_bad_toml_are_reported(tmp_path):
    with pytest.raises(ConfigError, match="no such file"):
        load_config(tmp_path / "nope.toml")
    with pytest.raises(ConfigError, match="folder"):
        load_config(tmp_path)
    bad = tmp_path / "bad.toml"
    bad.write_text('[store]\npath = "x.db"\n\n[service\nbatch_max = 5\n')
    with pytest.raises(ConfigError) as info:
        load_config(bad)
    (problem,) = info.value.problems
    assert problem.message.startswith("not valid TOML: line 4, column ")
    assert str(bad) in str(info.value)
    latin = tmp_path / "latin.toml"
    latin.write_bytes(b'[store]\npath = "caf\xe9.db"\n')
    with pytest.raises(ConfigError, match="UTF-8"):
        load_config(latin)


def test_every_problem_is_listed_at_once_by_key_path():
    found = problems(
        {
            "store": {"keep_readings_for": "soon"},
            "service": {"batch_max": 0},
            "defaults": {"method": "average"},
            "streams": [{"match": "a", "rules": "limits, trnd"}],
            "alerts": {"clear_after": 0},
            "sources": [mqtt(port=70000)],
            "notifiers": [{"name": "desk", "type": "console", "stream": "stdin"}],
            "routes": [{"name": "all", "notifiers": ["pager"]}],
            "budget": {"false_alarms_per_week": -1},
        }
    )
    assert set(found) == {
        "store.keep_readings_for",
        "service.batch_max",
        "defaults.method",
        "streams[0].rules",
        "alerts.clear_after",
        "sources[0].port",
        "notifiers[0].stream",
        "routes[0].notifiers[0]",
        "budget.false_alarms_per_week",
    }
    assert "'soon'" in found["store.keep_readings_for"]
    assert "'mean' or 'median'" in found["defaults.method"]


@pytest.mark.parametrize(
    ("data", "path", "suggestion"),
    [
        ({"store": {"pth": "x.db"}}, "store.pth", "path"),
        ({"sotre": {}}, "sotre", "store"),
        ({"streams": [{"match": "a", "learn_cont": 5}]}, "streams[0].learn_cont", "learn_count"),
        (
            {"sources": [mqtt(topics=[{"fliter": "a/+", "stream": "{2}", "payload": "json"}])]},
            "sources[0].topics[0].fliter",
            "filter",
        ),
        ({"sources": [file_source(pol_every="5s")]}, "sources[0].pol_every", "poll_every"),
        (
            {"notifiers": [{"name": "d", "type": "console", "strem": "stdout"}]},
            "notifiers[0].strem",
            "stream",
        ),
    ],
)
def test_a_typo_is_an_error_that_suggests_the_key(data, path, suggestion):
    found = problems(data)
    assert found[path].startswith(f"unknown key (did you mean {suggestion!r}?)")


# =============================================================================== [store] [service]


def test_store_paths_resolve_against_the_config_folder(tmp_path):
    config = config_from_dict({"store": {"path": "db/site.db"}}, base_dir=tmp_path)
    assert config.store.path == tmp_path / "db" / "site.db"
    absolute = config_from_dict({"store": {"path": "/var/lib/lw.db"}}, base_dir=tmp_path)
    assert absolute.store.path == Path("/var/lib/lw.db")


def test_store_retention():
    store = config_from_dict(
        {"store": {"keep_readings_for": "90d", "keep_readings_per_stream": 5000}}
    ).store
    assert store.keep_readings_for == 90 * 86400.0 and store.keep_readings_per_stream == 5000
    found = problems({"store": {"keep_readings_for": "0s", "keep_readings_per_stream": 0}})
    assert "longer than zero" in found["store.keep_readings_for"]
    assert "store.keep_readings_per_stream" in found


@pytest.mark.parametrize(
    ("listen", "address"),
    [("127.0.0.1:9464", ("127.0.0.1", 9464)), ("[::1]:9464", ("::1", 9464)), ("lw:80", ("lw", 80))],
)
def test_metrics_listener_address(listen, address):
    config = config_from_dict({"service": {"metrics_listen": listen}})
    assert config.service.metrics_address == address


@pytest.mark.parametrize("listen", ["localhost", "h:70000", "h:0", ":9464", "a b:1"])
def test_bad_metrics_listener_address(listen):
    assert (
        "host:port" in problems({"service": {"metrics_listen": listen}})["service.metrics_listen"]
    )


# =============================================================================== streams


STREAMS = {
    "defaults": {"rules": "limits", "learn_count": 20, "severity": "info"},
    "streams": [
        {"match": "pack-*/downtime", "lower_bound": 0, "cadence": "8h", "stale_after": 3},
        {"match": "pack-2/*", "rules": "nelson"},  # never reached for downtime: first wins
        {"match": "comp-?/discharge-temp", "rules": "western-electric, ewma(lam=0.1)"},
    ],
}


def test_the_first_matching_entry_wins_and_the_rest_comes_from_defaults():
    config = config_from_dict(STREAMS)
    pack = config.stream_settings("pack-2/downtime")
    assert (pack.entry, pack.rules, pack.learn_count, pack.lower_bound) == (0, "limits", 20, 0.0)
    assert pack.cadence == 8 * 3600.0 and pack.stale_after_s == 3 * 8 * 3600.0
    assert config.stream_settings("pack-2/scrap").rules == "nelson"
    comp = config.stream_settings("comp-a/discharge-temp")
    assert comp.entry == 2 and comp.lower_bound is None
    assert [s.rule for s in comp.monitor_settings().rule_specs][-1] == "ewma"
    other = config.stream_settings("oven-1/energy")
    assert other.entry is None and other.rules == "limits" and other.stale_after_s is None
    assert config.stream_settings("PACK-1/downtime").entry is None  # globs are case-sensitive


def test_monitor_settings_carry_every_engine_option():
    config = config_from_dict(
        {
            "defaults": {
                "rules": "nelson",
                "learn_count": 40,
                "method": "median",
                "exclude_beyond": True,
                "max_iterations": 3,
                "min_points": 15,
                "warn_points": 30,
                "autocorrelation_threshold": 0.7,
                "lower_bound": 0,
                "upper_bound": 100,
                "spec_lower": 5,
                "spec_upper": 95,
                "max_gap": "2h",
            }
        }
    )
    assert config.default_settings().monitor_settings() == MonitorSettings(
        rules="nelson",
        learn_count=40,
        method="median",
        exclude_beyond=True,
        max_iterations=3,
        min_points=15,
        warn_points=30,
        autocorrelation_threshold=0.7,
        lower_bound=0.0,
        upper_bound=100.0,
        spec_lower=5.0,
        spec_upper=95.0,
        max_gap=7200.0,
    )


@pytest.mark.parametrize(
    ("rules", "complaint"),
    [
        ("limits, trnd", "unknown rule or preset 'trnd'"),
        ("run-one-side(lenght=9)", "no parameter 'lenght'"),
        ("ewma(lam=2)", "lam"),
        ("", "no rules selected"),
    ],
)
def test_a_bad_rule_is_reported_at_its_key(rules, complaint):
    found = problems(
        {
            "defaults": {"rules": "limits"},
            "streams": [{"match": "a"}, {"match": "b", "rules": rules}],
        }
    )
    assert list(found) == ["streams[1].rules"]
    assert complaint in found["streams[1].rules"]


def test_merged_entries_are_checked_where_the_entry_sets_the_key():
    found = problems(
        {
            "defaults": {"learn_count": 12},
            "streams": [
                {"match": "a", "min_points": 20},  # 12 readings could never fit 20
                {"match": "b", "lower_bound": 10, "upper_bound": 5},
                {"match": "c", "stale_after": 3},  # no cadence to count in
                {"match": "d", "lower_bound": 0, "baseline": {"center": -1, "sigma": 1}},
                {"match": "e", "unit": "min"},  # fine: inherits fine defaults
            ],
        }
    )
    assert set(found) == {
        "streams[0].learn_count",
        "streams[1].upper_bound",
        "streams[2].stale_after",
        "streams[3].baseline.center",
    }
    assert "below min_points (20)" in found["streams[0].learn_count"]
    defaults_only = problems({"defaults": {"learn_count": 5}, "streams": [{"match": "x"}]})
    assert list(defaults_only) == ["defaults.learn_count"]


def test_typed_in_baselines():
    config = config_from_dict(
        {
            "streams": [
                {"match": "a", "baseline": {"center": 10.0, "sigma": 2.0}},
                {"match": "b", "baseline": {"center": 412.0, "mr_bar": 6.8}, "lower_bound": 0},
            ]
        }
    )
    a = config.stream_settings("a").typed_baseline()
    assert (a.center, a.sigma, a.ucl, a.lcl) == (10.0, 2.0, 16.0, 4.0)
    b = config.stream_settings("b").typed_baseline()
    # Montgomery, Appendix VI, n = 2: d2 = 1.128, so sigma = MRbar / 1.128
    assert b.sigma == pytest.approx(6.8 / 1.128, rel=1e-3)
    assert config.stream_settings("c").typed_baseline() is None
    # The engine can start monitoring on it at once: no learning phase.
    monitor = StreamMonitor("a", config.stream_settings("a").monitor_settings(), baseline=a)
    outcome = monitor.update(Reading("a", 1.0, 16.5))
    assert monitor.phase == "monitoring" and outcome.signals[0].rule == "beyond-limits"


@pytest.mark.parametrize(
    "baseline",
    [{"center": 1.0}, {"center": 1.0, "sigma": 1.0, "mr_bar": 1.1}],
)
def test_a_baseline_needs_exactly_one_spread(baseline):
    found = problems({"streams": [{"match": "a", "baseline": baseline}]})
    assert "exactly one of sigma and mr_bar" in found["streams[0].baseline.sigma"]


def test_infinite_numbers_are_refused():
    # TOML allows inf and nan as float values.
    found = problems({"defaults": {"lower_bound": float("-inf"), "spec_upper": float("nan")}})
    assert set(found) == {"defaults.lower_bound", "defaults.spec_upper"}


# =============================================================================== [alerts]


def test_alert_policy():
    config = config_from_dict(
        {
            "defaults": {"severity": "info"},
            "streams": [
                {"match": "oven-*", "severity": "warning"},
                {"match": "comp-*"},  # inherits info; blocks nothing below it by accident
            ],
            "alerts": {
                "clear_after": 4,
                "repeat_every": "off",
                "escalate_after": "30m",
                "give_up_after": "6h",
                "severity": [
                    {"streams": "oven-*", "rule": "beyond-limits", "severity": "critical"}
                ],
            },
        }
    )
    policy = config.alert_policy()
    assert policy.clear_after == 4 and policy.repeat_every_s is None
    assert policy.escalate_after_s == 1800.0 and policy.notification_ttl_s == 6 * 3600.0
    assert policy.severity_for("oven-1/energy", "beyond-limits") == "critical"
    assert policy.severity_for("oven-1/energy", "trend") == "warning"
    assert policy.severity_for("comp-a/temp", "trend") == "info"
    assert policy.severity_for("pack-1/downtime", "stale") == "info"


def test_alert_defaults_are_the_lifecycle_defaults():
    policy = config_from_dict({}).alert_policy()
    assert (policy.clear_after, policy.repeat_every_s, policy.escalate_after_s) == (
        10,
        3600.0,
        None,
    )


def test_bad_alert_settings():
    found = problems(
        {
            "alerts": {
                "repeat_every": "0s",
                "escalate_after": "never",
                "severity": [
                    {"rule": "trnd", "severity": "high"},
                    {"streams": "", "severity": "info"},
                ],
            }
        }
    )
    assert set(found) == {
        "alerts.repeat_every",
        "alerts.escalate_after",
        "alerts.severity[0].rule",
        "alerts.severity[0].severity",
        "alerts.severity[1].streams",
    }
    assert "stale" in found["alerts.severity[0].rule"]  # the list of rules includes it


# ========================================================================= notifiers and routes


NOTIFIERS = [
    {"name": "desk", "type": "console"},
    {"name": "hook", "type": "webhook", "url": "https://hooks.quillmoor.example/x"},
    {"name": "pager", "type": "command", "argv": ["/usr/local/bin/page"]},
]


def test_routes_choose_notifiers_by_stream_and_severity():
    config = config_from_dict(
        {
            "notifiers": NOTIFIERS,
            "routes": [
                {"name": "all", "notifiers": ["desk"], "notify_on": ["opened", "reminder"]},
                {
                    "name": "crit",
                    "streams": "comp-*",
                    "severities": ["critical"],
                    "notifiers": ["hook", "desk"],
                    "escalate_to": ["pager"],
                },
            ],
        }
    )
    assert config.targets("comp-a/temp", "trend", "critical", "opened") == ("desk", "hook")
    assert config.targets("comp-a/temp", "trend", "warning", "reminder") == ("desk",)
    # "crit" hears the default kinds: the end of an incident, but no reminders.
    assert config.targets("comp-a/temp", "trend", "critical", "cleared") == ("hook", "desk")
    assert config.targets("comp-a/temp", "trend", "critical", "reminder") == ("desk",)
    assert config.targets("comp-a/temp", "trend", "critical", "acknowledged") == ()
    # An escalation reaches escalate_to, and the route's own notifiers when they subscribe.
    assert config.targets("comp-a/temp", "trend", "critical", "escalated") == (
        "hook",
        "desk",
        "pager",
    )
    assert config.targets("pack-1/downtime", "trend", "critical", "escalated") == ()
    assert config.alert_policy().targets is not None
    assert config.notifier("hook")["url"] == "https://hooks.quillmoor.example/x"


def test_without_routes_every_notifier_hears_everything_but_escalations():
    config = config_from_dict({"notifiers": NOTIFIERS})
    assert config.targets("x", "trend", "info", "opened") == ("desk", "hook", "pager")
    assert config.targets("x", "trend", "critical", "escalated") == ()
    assert config.targets("x", "trend", "critical", "cleared") == ("desk", "hook", "pager")
    assert config.targets("x", "trend", "critical", "reminder") == ()


def test_route_references_must_resolve():
    found = problems(
        {
            "notifiers": NOTIFIERS,
            "routes": [
                {"name": "a", "notifiers": ["desk", "mail"], "escalate_to": ["pagr"]},
                {"name": "a", "notifiers": ["desk"]},
                {"name": "desk", "notifiers": ["desk"]},
                {"name": "empty"},
                {"name": "b", "notifiers": ["desk"], "severities": ["urgent"]},
            ],
        }
    )
    assert set(found) == {
        "routes[0].notifiers[1]",
        "routes[0].escalate_to[0]",
        "routes[1].name",
        "routes[2].name",
        "routes[3].notifiers",
        "routes[4].severities[0]",
    }
    assert "desk, hook, pager" in found["routes[0].notifiers[1]"]


def test_an_unknown_notifier_type_lists_the_known_ones():
    found = problems({"notifiers": [{"name": "x", "type": "pagerr"}, {"name": "y"}]})
    for known in known_types():
        assert known in found["notifiers[0].type"]
    assert "needs type" in found["notifiers[1].type"]


def test_notifier_settings_are_checked_by_their_plugin(tmp_path):
    found = problems(
        {
            "notifiers": [
                {"name": "hook", "type": "webhook", "url": "ftp://x"},
                {"name": "hook", "type": "smtp", "host": "smtp.quillmoor.example"},
            ]
        }
    )
    assert "http" in found["notifiers[0].url"]
    assert found["notifiers[1].sender"] == "is required"
    assert "already used by notifiers[0]" in found["notifiers[1].name"]
    config = config_from_dict(
        {"notifiers": [{**NOTIFIERS[1], "secret_file": "secrets/hook", "ca_file": "/etc/ca.pem"}]},
        base_dir=tmp_path,
    )
    assert config.notifiers[0]["secret_file"] == str(tmp_path / "secrets" / "hook")
    assert config.notifiers[0]["ca_file"] == "/etc/ca.pem"


@pytest.mark.parametrize(
    ("data", "path", "key"),
    [
        ({"sources": [mqtt(username="lw", password="hunter2")]}, "sources[0].password", "password"),
        ({"notifiers": [{**NOTIFIERS[1], "secret": "abc"}]}, "notifiers[0].secret", "secret"),
        (
            {"notifiers": [{**NOTIFIERS[0], "api_token": "abc"}]},
            "notifiers[0].api_token",
            "api_token",
        ),
        ({"service": {"token": "abc"}}, "service.token", "token"),
    ],
)
def test_inline_secrets_are_refused_with_the_way_to_give_them(data, path, key):
    found = problems(data)
    assert list(found) == [path]  # and no second "unknown key" complaint for the same key
    assert f"{key}_env" in found[path] and f"{key}_file" in found[path]


# =============================================================================== [[sources]]


def test_an_mqtt_source_with_its_defaults():
    config = config_from_dict({"sources": [mqtt()]})
    (source,) = config.sources
    assert isinstance(source, MqttSourceConfig)
    assert (source.port, source.protocol, source.keepalive_s) == (1883, "5", 30)
    assert source.session_expiry == 86400.0 and source.max_payload_bytes == 65536
    assert (source.reconnect_min_s, source.reconnect_max_s) == (1, 60)
    assert source.status_topic == "limitwatch/lw-1/status"
    assert source.topics[0].qos == 1 and source.topics[0].time_format == "auto"
    assert source.subscriptions == (("quillmoor/+/+", 1),)


def test_bad_topic_entries_are_reported_at_their_index():
    topics = [
        {"filter": "quillmoor/+/+", "stream": "{2}/{3}", "payload": "json"},
        {"filter": "quillmoor/#/x", "stream": "{1}", "payload": "json"},
        {"filter": "quillmoor/+", "stream": "{3}", "payload": "json"},
        {"filter": "quillmoor/+", "stream": "{2}", "payload": "number", "time": "ts"},
        {"filter": "quillmoor/+", "stream": "{2}", "payload": "json", "value": "a..b"},
        {"filter": "quillmoor/+", "stream": "{2}", "payload": "xml", "qos": 2},
    ]
    found = problems({"sources": [mqtt(topics=topics)]})
    assert set(found) == {
        "sources[0].topics[1].filter",
        "sources[0].topics[2].stream",
        "sources[0].topics[3].time",
        "sources[0].topics[4].value",
        "sources[0].topics[5].payload",
        "sources[0].topics[5].qos",
    }
    assert "4.7.1.2" in found["sources[0].topics[1].filter"]
    assert "payload = 'json'" in found["sources[0].topics[3].time"]


def test_source_types_are_a_tagged_choice():
    found = problems({"sources": [{"type": "mqqt", "name": "x"}, {"name": "y"}, "z"]})
    # An unknown type lists the installed source plugins (the loader shared with notifiers).
    assert "unknown source type 'mqqt'" in found["sources[0].type"]
    assert "file, kafka, mqtt" in found["sources[0].type"]
    assert "needs type" in found["sources[1].type"]
    assert "table" in found["sources[2]"]


def test_errors_in_a_mixed_source_list_are_reported_at_their_keys():
    """Two plugin types in one file are validated as a union tagged by type: each entry's
    problems are named by its own key path, without the tag."""
    found = problems(
        {
            "sources": [
                mqtt(port=0),
                {"type": "file", "name": "x", "glob": "*.csv", "format": "xml", "value": "v",
                 "time": "t", "stream": "s", "poll_evry": "5s"},
            ]
        }
    )
    assert set(found) == {"sources[0].port", "sources[1].format", "sources[1].poll_evry"}
    assert "did you mean 'poll_every'" in found["sources[1].poll_evry"]


def test_mqtt_connection_rules():
    found = problems(
        {
            "sources": [
                mqtt(
                    protocol="3.1.1",
                    password_env="LW_BROKER",
                    password_file="pw",
                    reconnect_min_s=30,
                    reconnect_max_s=5,
                ),
                mqtt(name="b", session_expiry=2.0**32, tls={"key_file": "k.pem"}),
                mqtt(name="c", client_id="lw/+", password_env="1BAD"),
                mqtt(name="plant", client_id="lw-1"),
            ]
        }
    )
    assert "section 3.1.2.9" in found["sources[0].username"]
    assert "not both" in found["sources[0].password_file"]
    assert "sources[0].reconnect_max_s" in found
    assert "4294967295" in found["sources[1].session_expiry"]
    assert "cert_file" in found["sources[1].tls.cert_file"]
    assert "set status_topic" in found["sources[2].status_topic"]
    assert "environment variable name" in found["sources[2].password_env"]
    assert "already used by sources[0]" in found["sources[3].name"]
    assert "already used by sources[0]" in found["sources[3].client_id"]


def test_mqtt_protocol_5_may_be_written_as_a_number_and_5_allows_a_bare_password():
    config = config_from_dict({"sources": [mqtt(protocol=5, password_env="LW_BROKER")]})
    assert config.sources[0].protocol == "5"


def test_a_file_source(tmp_path):
    config = config_from_dict({"sources": [file_source()]}, base_dir=tmp_path)
    (source,) = config.sources
    assert isinstance(source, FileSourceConfig)
    assert source.glob == str(tmp_path / "data" / "*.csv")
    assert (source.poll_every, source.start_at, source.time_format) == (5.0, "beginning", "auto")
    found = problems(
        {
            "sources": [
                file_source(stream_fixed="x"),
                file_source(name="b", stream=None),
                file_source(name="c", format="jsonl", time="at..x", start_at="middle"),
            ]
        }
    )
    assert set(found) == {
        "sources[0].stream",
        "sources[1].stream",
        "sources[2].time",
        "sources[2].start_at",
    }
    assert "exactly one" in found["sources[0].stream"]


def test_budget():
    assert (
        config_from_dict({"budget": {"false_alarms_per_week": 1.5}}).budget.false_alarms_per_week
        == 1.5
    )
    assert "budget.false_alarms_per_week" in problems({"budget": {"false_alarms_per_week": 0}})


# ===================================================================== warnings, secrets, files


def test_warnings_for_legal_but_risky_settings():
    config = config_from_dict(
        {
            "sources": [
                mqtt(
                    password_env="LW_BROKER",
                    session_expiry=0,
                    topics=[
                        {"filter": "q/+/temp", "stream": "{2}", "payload": "number", "qos": 0},
                        {"filter": "q/oven/#", "stream": "oven", "payload": "number"},
                    ],
                )
            ],
            "streams": [{"match": "*"}, {"match": "pack-*"}],
            "alerts": {"escalate_after": "1h"},
            "notifiers": NOTIFIERS,
            "routes": [{"name": "r", "notifiers": ["desk"]}],
        }
    )
    paths = {w.path for w in config.warnings()}
    assert paths == {
        "sources[0].tls",
        "sources[0].session_expiry",
        "sources[0].topics[0].qos",
        "sources[0].topics[1].filter",
        "streams[1].match",
        "alerts.escalate_after",
        "alerts.repeat_every",  # the route hears the default kinds, which leave reminders out
        "notifiers[1]",
        "notifiers[2]",
    }


def test_secrets_are_read_the_way_start_up_reads_them(tmp_path, monkeypatch):
    secret = tmp_path / "hook-secret"
    secret.write_text("s3cret\n")
    secret.chmod(0o644)
    data = {
        "sources": [mqtt(username="lw", password_env="LW_TEST_BROKER")],
        "notifiers": [{**NOTIFIERS[1], "secret_file": "hook-secret"}],
    }
    config = config_from_dict(data, base_dir=tmp_path)
    monkeypatch.delenv("LW_TEST_BROKER", raising=False)
    found = {p.path: p.message for p in check_secrets(config)}
    assert set(found) == {"sources[0].password_env", "notifiers[0].secret_file"}
    assert "LW_TEST_BROKER is not set" in found["sources[0].password_env"]
    assert "chmod 600" in found["notifiers[0].secret_file"]
    monkeypatch.setenv("LW_TEST_BROKER", "pw")
    secret.chmod(0o600)
    assert check_secrets(config) == []


def test_named_files_must_exist(tmp_path):
    data = {
        "store": {"path": "nowhere/lw.db"},
        "sources": [mqtt(tls={"ca_file": "ca.pem", "cert_file": "lw.crt", "key_file": "lw.key"})],
        "notifiers": [{**NOTIFIERS[1], "ca_file": "ca.pem"}],
    }
    config = config_from_dict(data, base_dir=tmp_path)
    paths = {p.path for p in check_files(config)}
    assert paths == {
        "store.path",
        "sources[0].tls.ca_file",
        "sources[0].tls.cert_file",
        "notifiers[0].ca_file",
    }
    (tmp_path / "ca.pem").write_text("x")
    (tmp_path / "lw.crt").write_text("x")
    (tmp_path / "nowhere").mkdir()
    assert check_files(config) == []
    assert [r.path for r in config.secret_refs()] == ["sources[0].tls.key_file"]


# =============================================================================== the shipped files


def test_the_demo_config_matches_the_demo_scenario():
    config = load_config(DEMO)
    assert config.warnings() == []
    assert [type(s) for s in config.sources] == [FileSourceConfig]
    assert [n["type"] for n in config.notifiers] == ["console"]
    assert config.store.path.suffix == ".db"
    for spec in demo.STREAMS:
        settings_ = config.stream_settings(spec.stream)
        assert settings_.entry is not None, spec.stream
        assert settings_.cadence == spec.cadence_s
        assert settings_.lower_bound == spec.lower_bound
        assert settings_.unit == spec.unit
        assert settings_.description in spec.description
        assert settings_.learn_count == demo.LEARN
        assert settings_.monitor_settings().learn_count == demo.LEARN


def test_the_example_config_loads():
    config = load_config(EXAMPLE)
    assert config.warnings() == []
    assert {s.type for s in config.sources} == {"mqtt", "file", "sparkplug", "kafka", "opcua"}
    assert config.bridge is not None and config.bridge.kafka.topic == "plant-readings"
    assert {type(s) for s in config.sources} >= {MqttSourceConfig, FileSourceConfig}
    assert config.alert_policy().escalate_after_s == 1800.0


def _unwrap(tp: Any) -> list[Any]:
    """The model classes (or containers) a field annotation can hold."""
    origin = typing.get_origin(tp)
    if origin is Annotated:
        return _unwrap(typing.get_args(tp)[0])
    if origin in (typing.Union, UnionType):
        return [x for a in typing.get_args(tp) for x in _unwrap(a)]
    if origin in (list, tuple):
        return _unwrap(typing.get_args(tp)[0])
    if tp is SourceSettings:  # a union of the source plugins' models, chosen by type
        from limitwatch.ingest.registry import SOURCES

        models = [SOURCES.settings_model(kind) for kind in SOURCES.known_types()]
        return [m for m in models if m.__module__.startswith("limitwatch.")]
    return [tp] if isinstance(tp, type) and issubclass(tp, BaseModel) else []


def _owner(model: type[BaseModel], key: str) -> type[BaseModel]:
    """The class that declares ``key`` (StreamEntry inherits StreamOptions' keys)."""
    for cls in reversed(model.__mro__):
        if key in getattr(cls, "__annotations__", {}) and issubclass(cls, BaseModel):
            return cls
    return model


def _all_keys(model: type[BaseModel], seen: set[str] | None = None) -> set[tuple[str, str]]:
    seen = set() if seen is None else seen
    if model.__name__ in seen:
        return set()
    seen.add(model.__name__)
    keys = set()
    for name, field in model.model_fields.items():
        keys.add((_owner(model, name).__name__, name))
        for inner in _unwrap(field.annotation):
            keys |= _all_keys(inner, seen)
    return keys


def _present(data: Any, model: type[BaseModel]) -> set[tuple[str, str]]:
    keys = set()
    for name, value in data.items():
        field = model.model_fields.get(name)
        if field is None:
            continue
        keys.add((_owner(model, name).__name__, name))
        inner = _unwrap(field.annotation)
        for item in value if isinstance(value, list) else [value]:
            if not isinstance(item, dict):
                continue
            if len(inner) > 1:  # a tagged union: pick the variant by its type
                inner_model = next(
                    m
                    for m in inner
                    if typing.get_args(m.model_fields["type"].annotation)[0] == item["type"]
                )
            elif inner:
                inner_model = inner[0]
            else:
                continue
            keys |= _present(item, inner_model)
    return keys


def _example_data() -> dict[str, Any]:
    import tomllib

    return tomllib.loads(EXAMPLE.read_text(encoding="utf-8"))


def test_the_example_config_sets_every_option_at_least_once():
    missing = _all_keys(Config) - _present(_example_data(), Config)
    assert not missing, "config/example.toml lacks: " + ", ".join(
        sorted(f"{model}.{key}" for model, key in missing)
    )


def test_the_example_config_shows_every_key_of_every_built_in_notifier():
    examples: dict[str, set[str]] = {}
    for entry in _example_data()["notifiers"]:
        examples.setdefault(entry["type"], set()).update(entry)
    every_key = {key for keys in examples.values() for key in keys}
    for type_name in known_types():
        model = settings_model(type_name)
        if not model.__module__.startswith("limitwatch."):
            continue  # a third-party plugin installed here
        shown = set(examples.get(type_name, set()))
        # <x>_env and <x>_file are two spellings of one option (where the secret lives): one
        # of them per notifier type is enough, as long as the file shows both somewhere.
        for key in list(shown):
            for one, other in (("_env", "_file"), ("_file", "_env")):
                if key.endswith(one) and key[: -len(one)] + other in model.model_fields:
                    pair = key[: -len(one)] + other
                    assert pair in every_key, f"config/example.toml never shows {pair}"
                    shown.add(pair)
        missing = set(model.model_fields) - shown
        assert not missing, f"config/example.toml: notifier type {type_name!r} lacks {missing}"


def test_every_key_in_the_example_is_explained_by_a_comment():
    # The first time a key is written, a comment must come before it in the same paragraph
    # (lines without a blank line between), so every option is documented where it appears.
    lines = EXAMPLE.read_text(encoding="utf-8").splitlines()
    first: dict[str, int] = {}
    for number, line in enumerate(lines):
        stripped = line.strip()
        if stripped and not stripped.startswith(("#", "[")) and "=" in stripped:
            key = stripped.split("=", 1)[0].strip()
            first.setdefault(key, number)
    undocumented = []
    for key, number in first.items():
        above = number - 1
        while above >= 0 and lines[above].strip() and not lines[above].lstrip().startswith("#"):
            above -= 1
        if above < 0 or not lines[above].lstrip().startswith("#"):
            undocumented.append(f"line {number + 1}: {key}")
    assert not undocumented, "config/example.toml, no comment before: " + "; ".join(undocumented)


# =============================================================================== limitwatch check


def test_check_summarizes_a_good_config(tmp_path):
    (tmp_path / "data").mkdir()
    result = cli("check", "--config", str(DEMO))
    assert result.returncode == 0, result.stderr
    out = result.stdout
    assert "usable" in out
    for stream in ("pack-*/downtime", "comp-a/discharge-temp", "oven-1/energy"):
        assert stream in out
    for name in ("quillmoor-export", "terminal", "everything"):
        assert name in out
    # no [budget] in the demo: the expected false alarms are information, not a warning
    assert "false alarms a week from 3 streams" in " ".join(out.split())
    assert "warning: budget" not in out


def test_check_lists_every_problem_by_key_path_and_exits_1(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text(
        "\n".join(
            [
                "[store]",
                'pth = "x.db"',
                "[[streams]]",
                'match = "a"',
                'rules = "limits, trnd"',
                "[[sources]]",
                'type = "mqtt"',
                'name = "b"',
                'host = "h"',
                'client_id = "c"',
                'password = "hunter2"',
                "[[sources.topics]]",
                'filter = "a/#/b"',
                'stream = "{1}"',
                'payload = "json"',
            ]
        )
        + "\n"
    )
    result = cli("check", "--config", str(path))
    assert result.returncode == 1
    for key in (
        "store.pth",
        "streams[0].rules",
        "sources[0].password",
        "sources[0].topics[0].filter",
    ):
        assert f"  {key}: " in result.stderr
    assert "4 problems" in result.stderr
    assert result.stdout == ""


def test_check_reads_secrets_unless_asked_not_to(tmp_path):
    path = tmp_path / "site.toml"
    path.write_text(
        '[[notifiers]]\nname = "hook"\ntype = "webhook"\n'
        'url = "https://hooks.quillmoor.example/x"\nsecret_env = "LW_TEST_UNSET_SECRET"\n'
    )
    env_free = {k: v for k, v in os.environ.items() if k != "LW_TEST_UNSET_SECRET"}
    assert "LW_TEST_UNSET_SECRET" not in env_free
    result = cli("check", "--config", str(path))
    assert result.returncode == 1
    assert "notifiers[0].secret_env" in result.stderr and "LW_TEST_UNSET_SECRET" in result.stderr
    offline = cli("check", "--config", str(path), "--file-only")
    assert offline.returncode == 0, offline.stderr
    assert "not read" in offline.stdout and "warning: sources" in offline.stdout


def test_check_the_example_without_its_secrets():
    result = cli("check", "--config", str(EXAMPLE), "--file-only")
    assert result.returncode == 0, result.stderr
    assert "plant-broker" in result.stdout and "on-call-pager" in result.stdout
