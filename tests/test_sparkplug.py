"""Sparkplug B decoding and the host application's bookkeeping (pure; no broker)."""

from __future__ import annotations

import contextlib
import struct

import pytest
from google.protobuf.message import DecodeError
from hypothesis import given, settings
from hypothesis import strategies as st

from limitwatch.ingest.sparkplug.host import SparkplugHost, parse_topic
from limitwatch.ingest.sparkplug.proto import DATATYPES, Payload
from limitwatch.ingest.sparkplug.simulate import bd_seq_metric, payload
from tests.helpers import examples

T = 1_767_225_600_000  # 2026-01-01T00:00:00Z in ms
NODE = "spBv1.0/plant-a/{}/press-1"


def birth(seq: int = 0, bd: int = 0) -> bytes:
    return payload(
        seq,
        [
            bd_seq_metric(bd),
            {"name": "Node Control/Rebirth", "datatype": "Boolean", "boolean_value": False},
            {"name": "oil/temp", "alias": 1, "datatype": "Double", "double_value": 41.5},
            {"name": "ram/force", "alias": 2, "datatype": "Int32", "int_value": 7},
        ],
        T,
    )


def handle(host: SparkplugHost, kind: str, body: bytes, device: str | None = None):
    topic = NODE.format(kind) + (f"/{device}" if device else "")
    message = parse_topic(topic)
    assert message is not None
    return host.handle(message, body, T / 1000 + 5)


def test_field_numbers_are_the_specifications():
    """Hand-encoded bytes (protobuf wire format: tag = field number << 3 | wire type) for a
    Payload with timestamp (1), seq (3) and one Metric (2) with alias (2), datatype (4) and
    double_value (13), as in the Sparkplug 3.0 schema, section 6.4."""
    metric = bytes([0x10, 0x05, 0x20, DATATYPES["Double"], 0x69]) + struct.pack("<d", 2.5)
    wire = bytes([0x08, 0x2A, 0x18, 0x07, 0x12, len(metric)]) + metric
    decoded = Payload.FromString(wire)
    assert (decoded.timestamp, decoded.seq) == (42, 7)
    (m,) = decoded.metrics
    assert (m.alias, m.datatype, m.double_value) == (5, 10, 2.5)
    assert Payload.FromString(decoded.SerializeToString()) == decoded


def test_birth_then_data_by_alias_become_readings():
    host = SparkplugHost()
    out = handle(host, "NBIRTH", birth())
    assert [(r.metric, r.value) for r in out.readings] == [("oil/temp", 41.5), ("ram/force", 7.0)]
    assert out.skipped == 2 and not out.refusals and not out.rebirth  # bdSeq, Node Control
    data = payload(1, [{"alias": 1, "timestamp": T + 1000, "double_value": 42.0}], T + 1000)
    out = handle(host, "NDATA", data)
    assert [(r.metric, r.time, r.value) for r in out.readings] == [("oil/temp", T / 1000 + 1, 42.0)]
    assert not out.refusals


def test_signed_integers_arrive_as_twos_complement():
    host = SparkplugHost()
    handle(host, "NBIRTH", birth())
    out = handle(host, "NDATA", payload(1, [{"alias": 2, "int_value": (1 << 32) - 3}], T))
    assert [r.value for r in out.readings] == [-3.0]


def test_a_seq_gap_keeps_the_message_and_asks_for_a_rebirth():
    host = SparkplugHost()
    handle(host, "NBIRTH", birth())
    out = handle(host, "NDATA", payload(3, [{"alias": 1, "double_value": 40.0}], T))
    assert out.rebirth
    assert [r.reason for r in out.refusals] == ["seq-gap"]
    assert "2 message(s) lost" in out.refusals[0].detail
    assert [r.value for r in out.readings] == [40.0]
    # seq wraps from 255 to 0 without a gap
    host.nodes[("plant-a", "press-1")].seq = 255
    out = handle(host, "NDATA", payload(0, [{"alias": 1, "double_value": 40.5}], T))
    assert not out.refusals and not out.rebirth


def test_an_unknown_alias_is_refused_never_guessed():
    host = SparkplugHost()
    handle(host, "NBIRTH", birth())
    out = handle(host, "NDATA", payload(1, [{"alias": 9, "double_value": 1.0}], T))
    assert out.rebirth and not out.readings
    assert [r.reason for r in out.refusals] == ["unknown-alias"]


def test_ndeath_needs_the_births_bdseq():
    host = SparkplugHost()
    handle(host, "NBIRTH", birth(bd=4))
    out = handle(host, "NDEATH", payload(None, [bd_seq_metric(3)]))
    assert [r.reason for r in out.refusals] == ["stale-death"]
    assert out.offline == []  # an older session's death takes nothing offline
    assert host.nodes[("plant-a", "press-1")].born
    out = handle(host, "NDEATH", payload(None, [bd_seq_metric(4)]))
    assert [r.reason for r in out.refusals] == ["node-offline"]
    assert "reported offline" in out.event
    # its numeric metrics (not bdSeq, not the Boolean rebirth control) go offline at once
    assert out.offline == [(None, "oil/temp"), (None, "ram/force")]
    assert out.offline_words == "the edge node plant-a/press-1 reported offline (NDEATH)"
    again = handle(host, "NDEATH", payload(None, [bd_seq_metric(4)]))
    assert again.offline == []  # already offline: nothing new to say
    out = handle(host, "NDATA", payload(1, [{"alias": 1, "double_value": 1.0}], T))
    assert out.rebirth and [r.reason for r in out.refusals] == ["not-born"]


def test_devices_are_born_fed_and_die():
    host = SparkplugHost()
    handle(host, "NBIRTH", birth())
    dbirth = payload(1, [{"name": "flow", "alias": 20, "datatype": "Float", "float_value": 2.5}])
    out = handle(host, "DBIRTH", dbirth, device="pump-2")
    assert [(r.device, r.metric, r.value) for r in out.readings] == [("pump-2", "flow", 2.5)]
    out = handle(host, "DDATA", payload(2, [{"alias": 20, "float_value": 3.0}]), device="pump-2")
    assert [r.value for r in out.readings] == [3.0]
    # a node alias is not the device's
    out = handle(host, "DDATA", payload(3, [{"alias": 1, "float_value": 3.0}]), device="pump-2")
    assert [r.reason for r in out.refusals] == ["unknown-alias"]
    out = handle(host, "DDEATH", payload(4, []), device="pump-2")
    assert [r.reason for r in out.refusals] == ["device-offline"]
    assert out.offline == [("pump-2", "flow")]  # the device's metrics only, not the node's
    assert out.offline_words == "the device plant-a/press-1/pump-2 reported offline (DDEATH)"
    out = handle(host, "DDATA", payload(5, [{"alias": 20, "float_value": 3.0}]), device="pump-2")
    assert [r.reason for r in out.refusals] == ["not-born"]


@pytest.mark.parametrize(
    ("metric", "reason"),
    [
        ({"alias": 1, "is_null": True}, "null-value"),
        ({"alias": 1, "string_value": "12.5"}, "not-a-number"),
        ({"alias": 1, "double_value": float("nan")}, "not-finite"),
        ({"alias": 1, "double_value": 1.0, "is_transient": True}, None),
        ({"name": "state", "datatype": "String", "string_value": "run"}, None),
    ],
)
def test_null_non_numeric_and_transient_metrics_are_refused_or_skipped(metric, reason):
    host = SparkplugHost()
    handle(host, "NBIRTH", birth())
    out = handle(host, "NDATA", payload(1, [metric], T))
    assert not out.readings
    assert [r.reason for r in out.refusals] == ([reason] if reason else [])
    assert out.skipped == (0 if reason else 1)


def test_historical_metrics_are_readings_at_their_own_time():
    host = SparkplugHost()
    handle(host, "NBIRTH", birth())
    old = {"alias": 1, "timestamp": T - 3_600_000, "double_value": 39.0, "is_historical": True}
    (reading,) = handle(host, "NDATA", payload(1, [old], T)).readings
    assert reading.historical and reading.time == T / 1000 - 3600


@settings(max_examples=examples(400), deadline=None)
@given(st.binary(max_size=200))
def test_random_bytes_decode_or_raise_decode_error_only(data):
    host = SparkplugHost()
    handle(host, "NBIRTH", birth())
    try:
        out = handle(host, "NDATA", data)
    except DecodeError:
        return
    assert all(r.reason for r in out.refusals)


@settings(max_examples=examples(400), deadline=None)
@given(st.integers(min_value=0, max_value=200), st.sampled_from(["NBIRTH", "NDATA", "NDEATH"]))
def test_truncated_payloads_never_crash(cut, kind):
    body = birth() + payload(1, [{"alias": 1, "double_value": 3.0, "timestamp": T}], T)
    host = SparkplugHost()
    handle(host, "NBIRTH", birth())
    with contextlib.suppress(DecodeError):
        handle(host, kind, body[:cut])


def test_check_validates_a_sparkplug_site_and_names_bad_keys(tmp_path):
    from tests.helpers import cli

    site = tmp_path / "site.toml"
    body = (
        '[[sources]]\ntype = "sparkplug"\nname = "presses"\nhost = "127.0.0.1"\n'
        'client_id = "lw-host"\nhost_id = "limitwatch"\nedge_nodes = ["plant-a/+"]\n'
    )
    site.write_text(body)
    done = cli("check", "--config", str(site), "--file-only")
    assert done.returncode == 0, done.stdout + done.stderr
    assert "presses (sparkplug 5): 127.0.0.1:1883 as host 'limitwatch'" in done.stdout
    site.write_text(
        body.replace('["plant-a/+"]', '["plant-a"]') + 'stream = "{group}/{device}"\n'
    )
    done = cli("check", "--config", str(site), "--file-only")
    said = done.stdout + done.stderr
    assert done.returncode != 0
    assert "sources[0].edge_nodes" in said and "sources[0].stream" in said
    assert "must name {metric}" in said


def _source():
    from limitwatch.ingest.base import SourceContext
    from limitwatch.ingest.sparkplug.settings import SparkplugSourceConfig
    from limitwatch.ingest.sparkplug.source import SparkplugSource

    settings = SparkplugSourceConfig.model_validate(
        {"type": "sparkplug", "name": "presses", "host": "127.0.0.1", "client_id": "lw",
         "host_id": "lw", "edge_nodes": ["plant-a/+"], "max_payload_bytes": 4096}
    )  # fmt: skip
    return SparkplugSource.from_settings(settings, SourceContext(future_tolerance=300.0))


@settings(max_examples=examples(300), deadline=None)
@given(
    st.sampled_from(["NBIRTH", "NDATA", "NDEATH", "DBIRTH", "DDATA", "DDEATH", "STATE"]),
    st.binary(max_size=300),
    st.integers(min_value=0, max_value=400),
)
def test_random_and_truncated_payloads_through_the_source_are_dead_letters(kind, junk, cut):
    """Through the source as the worker calls it: a list of readings and dead letters, each
    dead letter with a reason and the raw message; never an exception."""
    from limitwatch.ingest.mqtt.client import Delivery

    source = _source()
    device = "/pump-2" if kind.startswith("D") else ""
    topic = f"spBv1.0/plant-a/{kind}/press-1{device}"

    def deliver(topic: str, body: bytes) -> list:
        return source.parse(Delivery("presses", topic, body, T / 1000, 1, 1, False), T / 1000)

    good = deliver(NODE.format("NBIRTH"), birth())
    assert [p.reading.value for p in good if p.reading] == [41.5, 7.0]
    for body in (junk, (birth() + junk)[:cut]):
        for part in deliver(topic, body):
            if part.offline:  # a death of the born node: its streams, and no dead letter
                assert part.reading is None and part.error is None and "offline" in part.detail
                streams = {"plant-a/press-1/oil/temp", "plant-a/press-1/ram/force"}
                assert set(part.offline) <= streams
                continue
            assert part.reading is not None or (part.error and part.raw.startswith(topic.encode()))
