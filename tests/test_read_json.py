"""MQTT JSON payloads read by orjson where it agrees with the standard library, and by the
standard library everywhere else (limitwatch.ingest.payload.read_json).

The reference is Python's own ``json`` module (with NaN and Infinity read as floats, as the
service has always read them): whatever a payload gave before orjson came in, it gives now,
document or refusal. RFC 8259 section 6 (numbers) and section 9 (nesting limits are the
parser's choice) are where the two parsers may differ, so those edges are tried by hand and the
rest is fuzzed.
"""

from __future__ import annotations

import json
import math
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from limitwatch.ingest import payload as payload_module
from limitwatch.ingest.payload import PayloadError, read_json
from tests.helpers import examples

STDLIB = json.JSONDecoder(parse_constant=float)


def reference(data: bytes) -> Any:
    """What the service read before orjson: a document, or the refusal's message."""
    try:
        text = (data[3:] if data.startswith(b"\xef\xbb\xbf") else data).decode("utf-8")
        return STDLIB.decode(text)
    except (UnicodeDecodeError, ValueError) as exc:
        return f"bad-json: payload is not UTF-8 JSON: {exc}"
    except RecursionError:
        return "bad-json: payload nests arrays or objects too deeply to be read"


def ours(data: bytes) -> Any:
    try:
        return read_json(data)
    except PayloadError as exc:
        return str(exc)


def same(a: Any, b: Any) -> bool:
    """Equal, with NaN equal to NaN and the type of each number kept (1 is not 1.0 here: a
    sequence number's refusal quotes it)."""
    if type(a) is not type(b):
        return False
    if isinstance(a, float):
        return (math.isnan(a) and math.isnan(b)) or (
            a == b and math.copysign(1, a) == math.copysign(1, b)
        )
    if isinstance(a, dict):
        return list(a) == list(b) and all(same(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b, strict=True))
    return bool(a == b)


EDGES = [
    b'{"v": 1.5, "t": 1767225600, "seq": 7}',
    b'{"v": NaN}',
    b'{"v": -Infinity}',
    b'{"v": 1e400}',
    b'{"v": -1e400}',
    b'{"v": 1e-400}',
    b'{"v": 4.9e-324}',
    b'{"v": 1.7976931348623157e308}',
    b'{"v": 1.8e308}',
    b'{"seq": 9223372036854775807}',
    b'{"seq": 9223372036854775808}',
    b'{"seq": 18446744073709551615}',
    b'{"seq": 18446744073709551616}',
    b'{"seq": -9223372036854775809}',
    b'{"v": ' + b"9" * 400 + b"}",
    b'{"v": ' + b"9" * 5000 + b"}",
    b'{"v": 0.1000000000000000055511151231257827021181583404541015625}',
    b'{"v": 1, "v": 2}',
    b'\xef\xbb\xbf{"v": 1}',
    b'{"v": "\\ud800"}',
    b'{"v": "\xed\xa0\x80"}',
    b'{"v": "\xc0\xaf"}',
    b'{"v": -0}',
    b'{"v": -0.0}',
    b'{"v": 01}',
    b'{"v": .5}',
    b'{"v": 1.}',
    b'{"v": "\x1f"}',
    b'{"v": 5}\x00',
    b'  {"v": 5}\r\n\t',
    b"",
    b"\xff\xfe",
    b'{"value": ' + b"[" * 150 + b"]" * 150 + b"}",
    b'{"value": ' + b"[" * 199 + b"]" * 199 + b"}",
    b'{"value": ' + b"[" * 1000 + b"]" * 1000 + b"}",
    b'{"value": ' + b"[" * 1020 + b"]" * 1020 + b"}",
    b'{"value": ' + b"[" * 1030 + b"]" * 1030 + b"}",
    b"[" * 5000,
]


@pytest.mark.parametrize("data", EDGES, ids=range(len(EDGES)))
def test_each_edge_reads_as_the_standard_library_reads_it(data):
    assert same(ours(data), reference(data)), (ours(data), reference(data))


def test_orjson_really_reads_the_ordinary_payload(monkeypatch):
    """The fast path is taken (else the speed-up is a claim): the standard library's decoder
    is not called for an ordinary payload, and is for one orjson refuses."""
    calls = []

    class Watching(json.JSONDecoder):
        def decode(self, s, *args, **kwargs):  # type: ignore[override]
            calls.append(s)
            return super().decode(s, *args, **kwargs)

    monkeypatch.setattr(payload_module, "_JSON", Watching(parse_constant=float))
    assert read_json(b'{"v": 1.25, "t": 1767225600, "seq": 3}') == {
        "v": 1.25,
        "t": 1767225600,
        "seq": 3,
    }
    assert calls == []
    assert math.isnan(read_json(b'{"v": NaN}')["v"])
    assert len(calls) == 1


json_values = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(min_value=-(2**70), max_value=2**70)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=20),
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4)
    ),
    max_leaves=20,
)


@settings(max_examples=examples(400))
@given(json_values)
def test_documents_read_as_the_standard_library_reads_them(value):
    data = json.dumps(value).encode()
    assert same(ours(data), reference(data))


number_text = st.from_regex(
    r"-?(0|[1-9][0-9]{0,25})(\.[0-9]{1,25})?([eE][+-]?[0-9]{1,3})?", fullmatch=True
)


@settings(max_examples=examples(400))
@given(number_text)
def test_number_texts_read_as_the_standard_library_reads_them(text):
    data = b'{"v": ' + text.encode() + b"}"
    assert same(ours(data), reference(data))


@settings(max_examples=examples(300))
@given(st.binary(max_size=80))
def test_any_bytes_read_or_refused_as_the_standard_library_does(data):
    assert same(ours(data), reference(data))
