"""The OPC UA source without a server: settings (errors by key path, `limitwatch check`), what a
data change means (status, value, time), repeats after a new session, and a fuzz of parse()."""

from __future__ import annotations

import json
import math

import pytest
from asyncua import ua
from hypothesis import given, settings
from hypothesis import strategies as st

from limitwatch.config import ConfigError, config_from_dict
from limitwatch.ingest.base import SourceContext
from limitwatch.ingest.opcua.settings import OpcuaSourceConfig
from limitwatch.ingest.opcua.source import OpcuaSource
from limitwatch.ingest.opcua.values import Change, read_change, severity
from limitwatch.ingest.payload import LATEST_TIME
from tests.helpers import cli, examples

T0 = 1_767_225_600.0  # 2026-01-01
# Status codes from asyncua's table (generated from the OPC Foundation's StatusCode.csv)
GOOD = ua.StatusCodes.Good
BAD_SENSOR = ua.StatusCodes.BadSensorFailure
UNCERTAIN_LAST = ua.StatusCodes.UncertainLastUsableValue

SITE = {
    "type": "opcua",
    "name": "press-hall",
    "endpoint": "opc.tcp://127.0.0.1:4840",
    "items": [{"node": "ns=2;s=Press1.OilTemp"}],
}


def change(value=41.5, status=GOOD, source_time=T0, server_time=T0 + 0.2, **more) -> Change:
    fields = dict(
        source="press-hall",
        item=0,
        stream="press-1/oil-temp",
        node="ns=2;s=Press1.OilTemp",
        value=value,
        variant="Double",
        status=status,
        status_name={GOOD: "Good", BAD_SENSOR: "BadSensorFailure"}.get(status, "Other"),
        source_time=source_time,
        server_time=server_time,
        received_at=T0 + 1.0,
    )
    fields.update(more)
    return Change(**fields)


def read(c: Change, uncertain="refuse"):
    return read_change(c, uncertain=uncertain, future_tolerance=300.0)


def problems(entry: dict) -> dict[str, str]:
    with pytest.raises(ConfigError) as caught:
        config_from_dict({"sources": [entry]})
    return {p.path: p.message for p in caught.value.problems}


# -- settings ---------------------------------------------------------------------------------


def test_a_site_with_node_ids_browse_paths_and_templates():
    config = config_from_dict(
        {
            "sources": [
                {
                    **SITE,
                    "stream": "hall/{ns}/{name}",
                    "sampling_interval": "100ms",
                    "publishing_interval": "250ms",
                    "items": [
                        {"node": "ns=2;s=Press1.OilTemp", "stream": "press-1/oil-temp"},
                        {"node": "ns=2;i=5001"},
                        {"path": ["2:Press1", "2:RamForce"]},
                    ],
                }
            ]
        }
    )
    (source,) = config.sources
    assert isinstance(source, OpcuaSourceConfig)
    assert [source.stream_for(i) for i in range(3)] == [
        "press-1/oil-temp",
        "hall/2/5001",
        "hall/2/RamForce",
    ]
    assert (source.sampling_interval, source.publishing_interval) == (0.1, 0.25)
    assert source.uncertain == "refuse" and source.security.policy == "None"
    assert source.describe().startswith("press-hall (opcua, None): opc.tcp://127.0.0.1:4840")


@pytest.mark.parametrize(
    ("change_to", "path", "words"),
    [
        ({"endpoint": "http://10.0.0.1"}, "sources[0].endpoint", "opc.tcp://"),
        ({"items": [{"node": "ns=2;x=1"}]}, "sources[0].items[0].node", "not a node id"),
        ({"items": [{"node": "ns=2;i=12a"}]}, "sources[0].items[0].node", "whole number"),
        ({"items": [{"node": "ns=99999;i=1"}]}, "sources[0].items[0].node", "over 65535"),
        ({"items": [{"path": ["2:A", ""]}]}, "sources[0].items[0].path", "not a browse name"),
        ({"items": [{}]}, "sources[0].items[0].node", "one of them"),
        (
            {"items": [{"node": "i=85", "path": ["2:A"]}]},
            "sources[0].items[0].node",
            "one of them",
        ),
        ({"items": []}, "sources[0].items", ""),
        ({"stream": "{plant}/{name}"}, "sources[0].stream", "'plant'"),
        ({"items": [{"node": "i=1", "stream": "a\x07b"}]}, "sources[0].items[0].stream", ""),
        ({"uncertain": "maybe"}, "sources[0].uncertain", ""),
        ({"sampling_interval": "-1s"}, "sources[0].sampling_interval", ""),
        ({"publishing_interval": 0}, "sources[0].publishing_interval", "longer than zero"),
        ({"reconnect_min_s": 5, "reconnect_max_s": 2}, "sources[0].reconnect_max_s", "below"),
        ({"password_env": "OPCUA_PW"}, "sources[0].username", "user name"),
        ({"username": "limitwatch"}, "sources[0].password_env", "password"),
        ({"password": "hunter2"}, "sources[0].password", "never written into the config"),
        ({"security": {"policy": "Basic256"}}, "sources[0].security.policy", ""),
        (
            {"security": {"policy": "None", "mode": "Sign"}},
            "sources[0].security.mode",
            "no use",
        ),
        (
            {"items": [{"node": "i=85"}, {"node": "i=85"}]},
            "sources[0].items[1].node",
            "repeats items[0]",
        ),
    ],
)
def test_config_errors_name_the_key(change_to, path, words):
    found = problems({**SITE, **change_to})
    assert path in found, found
    assert words in found[path]


def test_check_warns_of_a_password_without_security_and_of_two_items_on_one_stream(tmp_path):
    config = config_from_dict(
        {
            "sources": [
                {
                    **SITE,
                    "username": "limitwatch",
                    "password_env": "LW_TEST_OPCUA_PW",
                    "stream": "hall",
                    "items": [{"node": "ns=2;i=1"}, {"node": "ns=2;i=2"}],
                }
            ]
        }
    )
    said = {p.path: p.message for p in config.warnings()}
    assert "policy None" in said["sources[0].security.policy"]
    assert "same stream 'hall' as items[0]" in said["sources[0].items[1]"]


def test_basic256sha256_needs_its_mode_certificates_and_a_server_to_trust():
    found = problems({**SITE, "security": {"policy": "Basic256Sha256"}})
    assert set(found) >= {
        "sources[0].security.mode",
        "sources[0].security.cert_file",
        "sources[0].security.key_file",
        "sources[0].security.server_cert_file",
    }
    assert "ca_file" in found["sources[0].security.server_cert_file"]


def test_check_validates_an_opcua_source_reads_its_secret_and_names_bad_keys(tmp_path):
    site = tmp_path / "site.toml"
    for name in ("client.pem", "server.pem"):
        (tmp_path / name).write_text("not checked here\n")
    key = tmp_path / "client-key.pem"
    key.write_text("secret\n")
    key.chmod(0o600)
    body = (
        '[[sources]]\ntype = "opcua"\nname = "press-hall"\n'
        'endpoint = "opc.tcp://127.0.0.1:4840"\nusername = "limitwatch"\n'
        'password_env = "LW_TEST_OPCUA_PW"\n'
        '[sources.security]\npolicy = "Basic256Sha256"\nmode = "SignAndEncrypt"\n'
        'cert_file = "client.pem"\nkey_file = "client-key.pem"\nserver_cert_file = "server.pem"\n'
        '[[sources.items]]\nnode = "ns=2;s=Press1.OilTemp"\n'
    )
    site.write_text(body)
    done = cli("check", "--config", str(site), env={"LW_TEST_OPCUA_PW": "s3cret"})
    assert done.returncode == 0, done.stdout + done.stderr
    said = done.stdout + done.stderr
    assert "press-hall (opcua, Basic256Sha256 SignAndEncrypt): opc.tcp://127.0.0.1:4840" in said

    done = cli("check", "--config", str(site), env={"LW_TEST_OPCUA_PW": ""})
    assert done.returncode != 0 and "sources[0].password_env" in done.stdout + done.stderr

    site.write_text(body.replace('node = "ns=2;s=Press1.OilTemp"', 'node = "Press1.OilTemp"'))
    done = cli("check", "--config", str(site), "--file-only")
    said = done.stdout + done.stderr
    assert done.returncode != 0 and "sources[0].items[0].node" in said, said


# -- one data change ----------------------------------------------------------------------------


def test_a_good_value_is_a_reading_at_its_source_time():
    found = read(change())
    assert found.error is None and found.reading is not None
    assert (found.reading.stream, found.reading.time, found.reading.value) == (
        "press-1/oil-temp",
        T0,
        41.5,
    )
    assert read(change(value=7, variant="Int32")).reading.value == 7.0


def test_without_a_source_time_the_server_time_then_the_receipt_time():
    assert read(change(source_time=None)).reading.time == T0 + 0.2
    assert read(change(source_time=None, server_time=None)).reading.time == T0 + 1.0


def test_a_bad_status_is_refused_with_its_name():
    found = read(change(status=BAD_SENSOR))
    assert found.reading is None and found.error == "bad-status"
    assert "BadSensorFailure (0x808C0000)" in found.detail and "press-1/oil-temp" in found.detail
    assert b"BadSensorFailure" in found.raw  # the dead letter keeps what came
    # the info bits (here: overflow, 0x80) do not make a Good value bad
    assert read(change(status=0x00000480)).reading is not None


def test_uncertain_follows_the_setting():
    c = change(status=UNCERTAIN_LAST, status_name="UncertainLastUsableValue")
    refused = read(c, uncertain="refuse")
    assert refused.error == "uncertain-status" and "UncertainLastUsableValue" in refused.detail
    assert read(c, uncertain="accept").reading.value == 41.5


def test_severity_is_the_two_top_bits():
    """IEC 62541-4, the StatusCode type: 00 Good, 01 Uncertain, 10 Bad (11 reserved, read as
    Bad); checked against asyncua's status code table (from the OPC Foundation's list)."""
    assert severity(ua.StatusCodes.UncertainInitialValue) == "uncertain"
    assert severity(ua.StatusCodes.BadCommunicationError) == "bad"
    assert severity(ua.StatusCodes.GoodClamped) == "good"
    assert [severity(s) for s in (0x00000000, 0x406C0000, 0x80000000, 0xC0000000)] == [
        "good",
        "uncertain",
        "bad",
        "bad",
    ]


@pytest.mark.parametrize(
    ("value", "variant", "reason", "words"),
    [
        (True, "Boolean", "not-a-number", "Boolean (true): a state"),
        ("auto", "String", "not-a-number", "String 'auto'"),
        ([1.0, 2.0], "Double", "not-a-number", "array of 2"),
        (None, "Null", "null-value", "no value"),
        (b"\x00\x01", "ByteString", "not-a-number", "ByteString"),
        (math.nan, "Double", "not-finite", "nan"),
        (-math.inf, "Float", "not-finite", "inf"),
        (10**400, "Int64", "not-finite", "too large"),
    ],
)
def test_values_that_are_not_numbers_are_refused_with_a_reason(value, variant, reason, words):
    found = read(change(value=value, variant=variant))
    assert (found.reading, found.error) == (None, reason)
    assert words in found.detail


def test_times_outside_the_calendar_or_in_the_future_are_refused():
    assert read(change(source_time=-11644473600.0)).error == "bad-time"  # 1601, OPC UA's zero
    assert read(change(source_time=LATEST_TIME + 1)).error == "bad-time"
    ahead = read(change(source_time=T0 + 3600.0))
    assert ahead.error == "in-the-future" and "source time" in ahead.detail


def _source(tmp_path=None, **keys) -> OpcuaSource:
    config = OpcuaSourceConfig.model_validate({**SITE, **keys})
    state = None if tmp_path is None else tmp_path / "db.source-press-hall.json"
    return OpcuaSource.from_settings(
        config, SourceContext(future_tolerance=300.0, state_file=state)
    )


def test_a_new_sessions_first_value_already_committed_is_not_stored_twice(tmp_path):
    source = _source(tmp_path)
    first, second = change(), change(value=41.75, source_time=T0 + 1.0)
    assert source.parse(first, T0 + 1).reading is not None
    source.acknowledge([first])
    assert source.parse(first, T0 + 2) is None  # the server's current value, sent again
    assert source.parse(second, T0 + 2).reading.value == 41.75
    source.acknowledge([second])
    assert source.health().detail["repeats_skipped"] == 1
    source.close()  # keeps the last committed change per stream
    kept = json.loads((tmp_path / "db.source-press-hall.json").read_text())
    assert kept["last"]["press-1/oil-temp"][0] == T0 + 1.0
    again = _source(tmp_path)  # after a restart of the service
    assert again.parse(second, T0 + 3) is None
    assert again.parse(change(value=42.0, source_time=T0 + 2.0), T0 + 3).reading.value == 42.0


def test_a_state_file_that_cannot_be_read_is_only_a_warning(tmp_path, caplog):
    (tmp_path / "db.source-press-hall.json").write_text("{not json")
    source = _source(tmp_path)
    assert source.parse(change(), T0 + 1).reading is not None
    assert "could not be read" in caplog.text


def test_health_before_start_says_not_connected():
    health = _source().health()
    assert (health.connected, health.ready) == (False, False)
    assert health.detail["endpoint"] == "opc.tcp://127.0.0.1:4840"


# -- fuzz ---------------------------------------------------------------------------------------

REASONS = {
    "bad-status",
    "uncertain-status",
    "not-a-number",
    "null-value",
    "not-finite",
    "bad-time",
    "in-the-future",
}

values = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(),
    st.floats(),
    st.text(max_size=50),
    st.binary(max_size=50),
    st.lists(st.floats(), max_size=5),
    st.dictionaries(st.text(max_size=5), st.integers(), max_size=3),
)
times = st.one_of(st.none(), st.floats(), st.floats(min_value=T0 - 1e6, max_value=T0 + 1e3))


@settings(max_examples=examples(400), deadline=None)
@given(
    value=values,
    status=st.integers(min_value=0, max_value=2**32 - 1),
    source_time=times,
    server_time=times,
    uncertain=st.sampled_from(["accept", "refuse"]),
)
def test_parse_never_raises_and_says_why(value, status, source_time, server_time, uncertain):
    """Random values, statuses and time stamps through the source as the worker calls it:
    a reading with a finite value and a time in the calendar, or a refusal with a known
    reason, a detail and the raw change; never an exception."""
    source = _source(uncertain=uncertain)
    c = change(value=value, status=status, source_time=source_time, server_time=server_time)
    found = source.parse(c, T0 + 1.0)
    assert found is not None
    if found.reading is not None:
        assert found.error is None
        assert math.isfinite(found.reading.value) and 0.0 <= found.reading.time < LATEST_TIME
        assert found.reading.time <= T0 + 1.0 + 300.0
        assert severity(status) == "good" or (severity(status), uncertain) == (
            "uncertain",
            "accept",
        )
        assert not isinstance(value, bool)
    else:
        assert found.error in REASONS and found.detail and found.raw
        if severity(status) == "bad":
            assert found.error == "bad-status"
