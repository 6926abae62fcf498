"""Numbers written as text in a JSON payload (`"61.2"`) are readings, as the README says; text
that is not a plain decimal number is refused with the reason the README names."""

from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace as NS

import pytest

from limitwatch.ingest.payload import PayloadError, PayloadParser

README = (Path(__file__).parents[1] / "README.md").read_text(encoding="utf-8")
TOPIC = NS(
    filter="gw/+", stream="{2}", payload="json", value="v", time=None, time_format="auto", seq=None
)


def parse(text: bytes) -> float:
    return PayloadParser(TOPIC).parse("gw/oven-1", text, received_at=1.0e9).value


def test_the_readme_says_numbers_as_text_are_read():
    assert '`{"v": "61.2"}` is read as 61.2' in README


@pytest.mark.parametrize("raw", [b'{"v": "61.2"}', b'{"v": " 61.2 "}', b'{"v": 61.2}'])
def test_a_decimal_written_as_text_is_the_number(raw):
    assert parse(raw) == 61.2


@pytest.mark.parametrize(
    ("raw", "reason"),
    [
        (b'{"v": "61,2"}', "not-a-number"),
        (b'{"v": "n/a"}', "not-a-number"),
        (b'{"v": "0x3D"}', "not-a-number"),
        (b'{"v": ""}', "missing-field"),
        (b'{"v": "NaN"}', "not-finite"),
        (b'{"v": "inf"}', "not-finite"),
    ],
)
def test_other_text_is_refused_with_the_reason_the_readme_names(raw, reason):
    with pytest.raises(PayloadError) as caught:
        parse(raw)
    assert caught.value.reason_code == reason
    assert f"`{reason}`" in README.split("Numbers written as text")[1].split("\n- **")[0]
