"""MQTT payloads and file rows to readings (limitwatch.ingest.payload).

External references used below: epoch seconds are computed with ``calendar.timegm`` (a plain
proleptic-Gregorian count, independent of the ISO parser under test); RFC 8259 (JSON) section 6
says NaN and Infinity are not JSON numbers, yet Python's ``json`` accepts them, so they must
still be refused as ``not-finite``; Python's ``repr(float)`` gives the shortest text that reads
back to the same double (the round-trip check).
"""

from __future__ import annotations

import calendar
import csv
import json
import math
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from limitwatch import demo
from limitwatch.config import FileSourceConfig, MqttSourceConfig, MqttTopic, load_config
from limitwatch.ingest.payload import (
    REASONS,
    PayloadError,
    PayloadParser,
    RowParser,
    SourceParser,
)
from limitwatch.model import Reading

ROOT = Path(__file__).resolve().parents[1]
T2027 = float(calendar.timegm((2027, 1, 1, 0, 0, 0)))  # 2027-01-01T00:00:00Z
RECEIVED = T2027 + 0.5


def topic(**overrides):
    fields = {"filter": "quillmoor/+/+", "stream": "{2}/{3}", "payload": "json"}
    fields.update(overrides)
    return MqttTopic.model_validate(fields)


def number_parser(limit: int | None = None) -> PayloadParser:
    return PayloadParser(topic(payload="number"), max_payload_bytes=limit)


def json_parser(**overrides) -> PayloadParser:
    return PayloadParser(topic(**overrides), max_payload_bytes=1024)


TOPIC = "quillmoor/comp-a/discharge-temp"


def reason(call) -> str:
    with pytest.raises(PayloadError) as info:
        call()
    assert info.value.message and str(info.value).startswith(info.value.reason_code)
    return info.value.reason_code


# -- plain numbers ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("payload", "value"),
    [(b"42.5", 42.5), (b" 17 ", 17.0), (b"-3e2", -300.0), (b"+1.5\n", 1.5), (b".5", 0.5)],
)
def test_plain_numbers_are_read_and_timed_at_receipt(payload, value):
    reading = number_parser().parse(TOPIC, payload, RECEIVED)
    assert reading == Reading("comp-a/discharge-temp", RECEIVED, value, None)


@settings(max_examples=300, deadline=None)
@given(st.floats(allow_nan=False, allow_infinity=False))
def test_every_finite_float_survives_its_own_text(x):
    assert number_parser().parse(TOPIC, repr(x).encode(), RECEIVED).value == x


# Every bad input and the dead-letter reason it must get. The last test checks the table
# covers every reason code the module documents.
BAD = [
    # plain numbers
    ("number", b"abc", "not-a-number"),
    ("number", b"", "not-a-number"),
    ("number", b"1_000", "not-a-number"),  # Python's float() would accept this
    ("number", b"0x10", "not-a-number"),
    ("number", b"\xff\xfe", "not-a-number"),
    ("number", b"nan", "not-finite"),
    ("number", b"-Infinity", "not-finite"),
    ("number", b"1e999", "not-finite"),
    ("number", b"1" * 2000, "oversize"),
    # JSON structure and the value
    ("json", b"{not json", "bad-json"),
    ("json", b'{"value": 1', "bad-json"),
    ("json", b"\xff", "bad-json"),
    ("json", b'{"val": 1}', "missing-field"),
    ("json", b'{"value": null}', "missing-field"),
    ("json", b'{"value": "  "}', "missing-field"),
    ("json", b"[1, 2]", "missing-field"),
    ("json", b'{"value": true}', "not-a-number"),
    ("json", b'{"value": "12 kg"}', "not-a-number"),
    ("json", b'{"value": {"v": 1}}', "not-a-number"),
    ("json", b'{"value": NaN}', "not-finite"),
    ("json", b'{"value": -Infinity}', "not-finite"),
    ("json", b'{"value": 1e400}', "not-finite"),
    ("json", b'{"value": ' + b"9" * 400 + b"}", "not-finite"),
]


@pytest.mark.parametrize(("kind", "payload", "expected"), BAD)
def test_bad_payloads_get_their_reason(kind, payload, expected):
    parser = number_parser(limit=1024) if kind == "number" else json_parser()
    assert reason(lambda: parser.parse(TOPIC, payload, RECEIVED)) == expected


def test_oversize_is_checked_before_anything_else_and_the_limit_itself_is_fine():
    parser = number_parser(limit=4)
    assert parser.parse(TOPIC, b"1234", RECEIVED).value == 1234.0
    assert reason(lambda: parser.parse("unmapped", b"12345", RECEIVED)) == "oversize"


def test_an_unmapped_topic_is_a_dead_letter():
    parser = number_parser()
    assert reason(lambda: parser.parse("elsewhere/a/b", b"1", RECEIVED)) == "unmapped-topic"
    assert reason(lambda: parser.parse("quillmoor/a", b"1", RECEIVED)) == "unmapped-topic"
    assert parser.matches(TOPIC) and not parser.matches("quillmoor/a")


# -- JSON fields --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("path", "document", "value"),
    [
        ("value", {"value": 71.5}, 71.5),
        ("data.temp", {"data": {"temp": 71.5}}, 71.5),
        ("readings.0.v", {"readings": [{"v": 3}, {"v": 4}]}, 3.0),
        ("readings.1", {"readings": [9, 8]}, 8.0),
        ("by_id.7", {"by_id": {"7": 2.25}}, 2.25),  # a number part also reads a text key
        ("value", {"value": "42.5"}, 42.5),  # a number sent as text
        ("value", {"value": 12}, 12.0),
    ],
)
def test_dotted_field_paths(path, document, value):
    parser = json_parser(value=path)
    reading = parser.parse(TOPIC, json.dumps(document).encode(), RECEIVED)
    assert reading.value == value and reading.time == RECEIVED and reading.seq is None


def test_a_list_index_past_the_end_is_a_missing_field():
    parser = json_parser(value="readings.5.v")
    payload = b'{"readings": [{"v": 1}]}'
    assert reason(lambda: parser.parse(TOPIC, payload, RECEIVED)) == "missing-field"


# -- time stamps --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("time_format", "stamp", "expected"),
    [
        ("epoch_s", T2027, T2027),
        ("epoch_s", str(T2027 + 0.25), T2027 + 0.25),
        ("epoch_ms", int(T2027 * 1000) + 250, T2027 + 0.25),
        ("iso8601", "2027-01-01T00:00:00Z", T2027),
        ("iso8601", "2027-01-01T01:00:00+01:00", T2027),
        ("iso8601", "2027-01-01 00:00:00.5", T2027 + 0.5),  # no offset: UTC
        ("auto", T2027, T2027),
        ("auto", "2027-01-01T08:00:00Z", T2027 + 8 * 3600),
        ("auto", str(int(T2027)), T2027),
    ],
)
def test_time_formats(time_format, stamp, expected):
    parser = json_parser(time="ts", time_format=time_format)
    payload = json.dumps({"value": 1, "ts": stamp}).encode()
    assert parser.parse(TOPIC, payload, RECEIVED).time == pytest.approx(expected, abs=1e-6)


@pytest.mark.parametrize(
    ("time_format", "stamp", "hint"),
    [
        ("iso8601", T2027, "is a number"),
        ("epoch_s", "2027-01-01T00:00:00Z", "not a number"),
        ("epoch_ms", "yesterday", "not a number"),
        ("auto", "yesterday", "neither epoch seconds nor an ISO 8601"),
        ("auto", T2027 * 1000, "epoch_ms"),  # milliseconds read as seconds
        ("auto", -5, "1970"),
        ("auto", True, "not a time stamp"),
        ("auto", [1], "not a time stamp"),
        ("epoch_ms", 1e308, "1970"),
    ],
)
def test_bad_times(time_format, stamp, hint):
    parser = json_parser(time="ts", time_format=time_format)
    payload = json.dumps({"value": 1, "ts": stamp}).encode()
    with pytest.raises(PayloadError) as info:
        parser.parse(TOPIC, payload, RECEIVED)
    assert info.value.reason_code == "bad-time"
    assert hint in info.value.message


def test_a_configured_time_field_must_be_there():
    parser = json_parser(time="ts")
    assert reason(lambda: parser.parse(TOPIC, b'{"value": 1}', RECEIVED)) == "missing-field"


# -- sequence numbers ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("raw", "seq"), [(0, 0), (17, 17), ("17", 17), (5.0, 5), (2**63 - 1, 2**63 - 1)]
)
def test_sequence_numbers(raw, seq):
    parser = json_parser(seq="n")
    payload = json.dumps({"value": 1, "n": raw}).encode()
    assert parser.parse(TOPIC, payload, RECEIVED).seq == seq


@pytest.mark.parametrize("raw", [-1, 1.5, "x", "-3", True, 2**63, None, [1]])
def test_bad_sequence_numbers(raw):
    parser = json_parser(seq="n")
    payload = json.dumps({"value": 1, "n": raw}).encode()
    expected = "missing-field" if raw is None else "bad-seq"
    assert reason(lambda: parser.parse(TOPIC, payload, RECEIVED)) == expected


def test_everything_at_once():
    parser = json_parser(value="data.temp", time="ts", time_format="epoch_ms", seq="n")
    payload = b'{"data": {"temp": 86.2}, "ts": 1798761600250, "n": 41}'
    assert parser.parse(TOPIC, payload, RECEIVED) == Reading(
        "comp-a/discharge-temp", T2027 + 0.25, 86.2, 41
    )


@pytest.mark.parametrize("bom", [b"", b"\xef\xbb\xbf"])
def test_json_payloads_read_the_same_with_or_without_a_byte_order_mark(bom):
    # RFC 8259 section 8.1: a parser may ignore a leading byte order mark, and some gateways
    # (spreadsheet exports, Windows tools) send one.
    payload = bom + '{"value": 86.25, "note": "\u00b0C été"}'.encode()
    assert json_parser().parse(TOPIC, payload, RECEIVED).value == 86.25
    assert reason(lambda: json_parser().parse(TOPIC, bom + b'{"value": "\xff"}', RECEIVED)) == (
        "bad-json"
    )
    # Only one mark at the very start is dropped; a second is not JSON.
    twice = b"\xef\xbb\xbf" * 2 + b'{"value": 1}'
    assert reason(lambda: json_parser().parse(TOPIC, twice, RECEIVED)) == "bad-json"


# -- a whole MQTT source ------------------------------------------------------------------------


def test_the_first_matching_topic_entry_parses():
    source = MqttSourceConfig.model_validate(
        {
            "type": "mqtt",
            "name": "plant",
            "host": "broker.quillmoor.example",
            "client_id": "lw-1",
            "max_payload_bytes": 64,
            "topics": [
                {"filter": "gw/oven-1/energy", "stream": "oven-1/energy", "payload": "number"},
                {"filter": "gw/+/+", "stream": "{2}/{3}", "payload": "json", "value": "v"},
            ],
        }
    )
    parser = SourceParser(source)
    assert parser.parse("gw/oven-1/energy", b"412.5", RECEIVED).stream == "oven-1/energy"
    assert parser.parse("gw/comp-a/temp", b'{"v": 86}', RECEIVED) == Reading(
        "comp-a/temp", RECEIVED, 86.0
    )
    assert reason(lambda: parser.parse("other/x", b"1", RECEIVED)) == "unmapped-topic"
    assert reason(lambda: parser.parse("gw/a/b", b"1" * 65, RECEIVED)) == "oversize"


@settings(max_examples=50, deadline=None)
@given(
    topics=st.lists(
        st.sampled_from(
            ["gw/oven-1/energy", "gw/comp-a/temp", "gw/comp-b/temp", "other/x", "gw/a", "gw/+"]
        ),
        max_size=40,
    ),
    kept=st.integers(1, 8),
)
def test_remembered_routes_give_what_matching_afresh_gives(topics, kept):
    # The source remembers each topic's entry and stream; however small that memory, and
    # whatever order topics come in, every message is routed as if matched from scratch.
    source = SourceParser(_two_entry_source())
    before, SourceParser.ROUTES_KEPT = SourceParser.ROUTES_KEPT, kept
    try:
        for topic in topics:
            fresh = SourceParser(_two_entry_source()).route(topic)
            remembered = source.route(topic)
            assert (remembered and (remembered[0].mapper.filter, remembered[1])) == (
                fresh and (fresh[0].mapper.filter, fresh[1])
            )
            assert len(source._routes) <= kept
    finally:
        SourceParser.ROUTES_KEPT = before


def _two_entry_source() -> MqttSourceConfig:
    return MqttSourceConfig.model_validate(
        {
            "type": "mqtt",
            "name": "plant",
            "host": "broker.quillmoor.example",
            "client_id": "lw-1",
            "topics": [
                {"filter": "gw/oven-1/energy", "stream": "oven-1/energy", "payload": "number"},
                {"filter": "gw/+/+", "stream": "{2}/{3}", "payload": "json", "value": "v"},
            ],
        }
    )


# -- file rows ----------------------------------------------------------------------------------


def file_source(**overrides) -> FileSourceConfig:
    fields = {
        "type": "file",
        "name": "export",
        "glob": "/data/*.csv",
        "format": "csv",
        "value": "value",
        "time": "time",
        "stream": "stream",
    }
    fields.update(overrides)
    return FileSourceConfig.model_validate(fields)


def test_csv_rows():
    parser = RowParser(file_source(seq="row"))
    row = {
        "time": "2027-01-01T00:00:00Z",
        "stream": " pack-1/downtime ",
        "value": "17.25",
        "row": "3",
    }
    assert parser.parse(row, RECEIVED) == Reading("pack-1/downtime", T2027, 17.25, 3)


def test_csv_columns_are_exact_names_even_with_dots():
    parser = RowParser(file_source(value="temp.c", stream=None, stream_fixed="comp-a/temp"))
    row = {"time": str(T2027), "temp.c": "86.1"}
    assert parser.parse(row, RECEIVED) == Reading("comp-a/temp", T2027, 86.1)


@pytest.mark.parametrize(
    ("row", "expected"),
    [
        ({"time": "2027-01-01T00:00:00Z", "stream": "a", "value": ""}, "missing-field"),
        ({"time": "2027-01-01T00:00:00Z", "stream": "a", "value": None}, "missing-field"),
        ({"time": "2027-01-01T00:00:00Z", "stream": "", "value": "1"}, "missing-field"),
        ({"time": "2027-01-01T00:00:00Z", "value": "1"}, "missing-field"),
        ({"time": "", "stream": "a", "value": "1"}, "missing-field"),
        ({"time": "soon", "stream": "a", "value": "1"}, "bad-time"),
        ({"time": "2027-01-01T00:00:00Z", "stream": "a", "value": "n/a"}, "not-a-number"),
        ({"time": "2027-01-01T00:00:00Z", "stream": "a", "value": "inf"}, "not-finite"),
    ],
)
def test_bad_csv_rows(row, expected):
    assert reason(lambda: RowParser(file_source()).parse(row, RECEIVED)) == expected


def test_json_lines_use_dotted_paths():
    parser = RowParser(
        file_source(format="jsonl", value="energy.kwh", time="at", stream="line.id", seq="n")
    )
    record = {"energy": {"kwh": 412.5}, "at": T2027, "line": {"id": 7}, "n": 2}
    assert parser.parse(record, RECEIVED) == Reading("7", T2027, 412.5, 2)
    bad_stream = {**record, "line": {"id": ["oven"]}}
    assert reason(lambda: parser.parse(bad_stream, RECEIVED)) == "bad-stream"
    assert reason(lambda: parser.parse([1, 2], RECEIVED)) == "bad-json"  # type: ignore[arg-type]


# -- inputs that once escaped the parser as exceptions and stopped the service (issue 11) ------


def test_json_nested_a_thousand_levels_deep_is_bad_json_not_a_recursion_error():
    deep = b'{"value": ' + b"[" * 1000 + b"]" * 1000 + b"}"  # about 2 KB, under the size limit
    parser = PayloadParser(topic(), max_payload_bytes=65536)
    assert reason(lambda: parser.parse(TOPIC, deep, RECEIVED)) == "bad-json"


def test_a_sequence_number_of_5000_digits_is_bad_seq_not_a_digit_limit_error():
    parser = json_parser(seq="n")
    payload = json.dumps({"value": 1.0, "n": "9" * 5000}).encode()
    parser.max_payload_bytes = None
    assert reason(lambda: parser.parse(TOPIC, payload, RECEIVED)) == "bad-seq"
    # leading zeros are not significant digits
    padded = json.dumps({"value": 1.0, "n": "0" * 40 + "17"}).encode()
    assert parser.parse(TOPIC, padded, RECEIVED).seq == 17


def test_a_5000_digit_number_in_a_payload_is_bad_json():
    parser = json_parser()
    parser.max_payload_bytes = None
    assert reason(lambda: parser.parse(TOPIC, b'{"value": ' + b"9" * 5000 + b"}", 0.0)) == (
        "bad-json"
    )


FUTURE = "9999-12-31T23:59:59Z"


def test_a_reading_dated_past_the_future_tolerance_is_refused_as_in_the_future():
    mqtt = PayloadParser(topic(time="t"), max_payload_bytes=1024, future_tolerance=300.0)
    ahead = json.dumps({"value": 1.0, "t": FUTURE}).encode()
    assert reason(lambda: mqtt.parse(TOPIC, ahead, RECEIVED)) == "in-the-future"
    with pytest.raises(PayloadError, match="future_tolerance"):
        mqtt.parse(TOPIC, ahead, RECEIVED)
    # a sender's clock a little ahead is fine, up to the tolerance and not past it
    near = json.dumps({"value": 1.0, "t": RECEIVED + 300.0}).encode()
    assert mqtt.parse(TOPIC, near, RECEIVED).time == RECEIVED + 300.0
    over = json.dumps({"value": 1.0, "t": RECEIVED + 301.0}).encode()
    assert reason(lambda: mqtt.parse(TOPIC, over, RECEIVED)) == "in-the-future"
    rows = RowParser(file_source(), future_tolerance=60.0)
    row = {"time": FUTURE, "stream": "a", "value": "1"}
    assert reason(lambda: rows.parse(row, RECEIVED)) == "in-the-future"


@pytest.mark.parametrize(
    ("stream", "why"),
    [
        ("oven-1\ud800", r"lone surrogate U\+D800"),
        ("oven-1\nline-2", r"control character U\+000A"),
        ("oven\x1b[31m", r"control character U\+001B"),
        ("oven\x85x", r"control character U\+0085"),
        ("x" * 257, "characters long; a stream id has at most 256"),
    ],
)
def test_unusable_stream_ids_are_refused_at_every_edge(stream, why):
    jsonl = RowParser(file_source(format="jsonl"))
    record = {"time": T2027, "stream": stream, "value": 1.0}
    with pytest.raises(PayloadError, match=why) as info:
        jsonl.parse(record, RECEIVED)
    assert info.value.reason_code == "bad-stream"
    # (pydantic refuses a lone surrogate in any config text by itself)
    with pytest.raises(ValueError, match="unicode" if "\ud800" in stream else why):
        file_source(stream=None, stream_fixed=stream)
    # an MQTT topic level (a broker may pass control characters on) and the whole topic
    if "\ud800" not in stream:  # a topic is decoded UTF-8: it cannot hold a lone surrogate
        single = PayloadParser(topic(), max_payload_bytes=None)
        source = SourceParser(_two_entry_source())
        for parser, prefix, payload in (
            (single, "quillmoor", b'{"value": 1}'),
            (source, "gw", b'{"v": 1}'),
        ):
            for _ in range(2):  # the second time from the remembered route
                with pytest.raises(PayloadError, match=why) as info:
                    parser.parse(f"{prefix}/{stream}/temp", payload, RECEIVED)
                assert info.value.reason_code == "bad-stream"
    assert len("x" * 256) == 256 and jsonl.parse({**record, "stream": "x" * 256}, 0.0)


def test_every_reason_code_is_exercised_by_these_tests():
    covered = {expected for _, _, expected in BAD} | {
        "unmapped-topic",
        "bad-time",
        "in-the-future",
        "bad-seq",
        "bad-stream",
    }
    assert covered == set(REASONS)


# -- the demo's files, end to end ---------------------------------------------------------------


def test_demo_export_rows_parse_to_the_demo_readings(tmp_path):
    config = load_config(ROOT / "config" / "demo.toml")
    (source,) = config.sources
    assert isinstance(source, FileSourceConfig)
    rows = demo.generate(after=10)
    path = demo.write_csv(tmp_path / "quillmoor.csv", rows)
    parser = RowParser(source)
    with path.open(newline="", encoding="utf-8") as handle:
        readings = [parser.parse(row, received_at=0.0) for row in csv.DictReader(handle)]
    expected = sorted(rows, key=lambda r: (r[1], r[0]))
    assert [(r.stream, r.time) for r in readings] == [(s, t) for s, t, _ in expected]
    assert all(
        math.isclose(r.value, v, abs_tol=0.005)
        for r, (_, _, v) in zip(readings, expected, strict=True)
    )
