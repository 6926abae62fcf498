"""One escaper for human output (limitwatch.textout.printable): tables, notices, dead letters
and notifier errors all show field text through it, and nothing in it can drive a terminal,
forge a line or reorder what is displayed."""

from __future__ import annotations

import ast
import unicodedata

from hypothesis import given
from hypothesis import strategies as st

from limitwatch.alerts.messages import headline, text_lines
from limitwatch.payloadview import view_payload
from limitwatch.textout import printable, table
from tests.test_notifiers import payload


def read_back(shown: str) -> str:
    """What a Python string literal holding ``shown`` means: the escapes are Python's, so a
    text without backslashes must read back to exactly the original."""
    return ast.literal_eval('"' + shown.replace('"', '\\"') + '"')


def test_control_characters_are_escaped():
    text = "kiln\x00-3\x1b[2J\x07\x7f\x85\x9f/t\ne\rm\tp"
    shown = printable(text)
    assert shown == "kiln\\x00-3\\x1b[2J\\x07\\x7f\\x85\\x9f/t\\ne\\rm\\tp"
    assert shown.isprintable() and read_back(shown) == text


def test_lone_surrogates_are_escaped_not_passed_on():
    # a surrogate cannot be written as UTF-8: printed raw it would raise in the terminal's
    # encoder, or show as the replacement character and hide what arrived
    text = "pack-2/\ud800down\udfff"
    shown = printable(text)
    assert shown == "pack-2/\\ud800down\\udfff"
    shown.encode("utf-8")  # does not raise
    assert read_back(shown) == text


def test_bidi_overrides_isolates_and_other_format_characters_are_escaped():
    # U+202E would show "pack-2/emitnwod" as "pack-2/downtime"; isolates and marks likewise
    # change the order or look of what is displayed
    marks = "\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069\u200e\u200f\u061c\u200b\ufeff"
    for ch in marks:
        shown = printable(f"a{ch}b")
        assert ch not in shown and shown == f"a\\u{ord(ch):04x}b", unicodedata.name(ch)
    assert printable("line\u2028sep\u2029par") == "line\\u2028sep\\u2029par"
    assert printable("a\U000e0001b") == "a\\U000e0001b"  # a tag character, past U+FFFF


def test_printable_text_and_units_pass_unchanged():
    for text in ("pack-2/downtime °C", "Ölwanne Δp µm³", "ライン-3/温度", "a b"):
        assert printable(text) == text


def test_escaping_twice_changes_nothing():
    # text passes more than one layer on its way out (fit_table escapes, then table does)
    text = "C:\\data\x1b[2J\u202e\ud800\n"
    once = printable(text)
    assert once == "C:\\data\\x1b[2J\\u202e\\ud800\\n"
    assert printable(once) == once


def test_a_dead_letter_payload_doubles_its_backslashes_so_it_reads_back_exactly():
    typed, real = b"C:\\x1b", b"C:\x1b"
    assert view_payload(typed).text == "C:\\\\x1b"
    assert view_payload(real).text == "C:\\x1b"
    assert read_back(view_payload(typed).text) == typed.decode()


def test_long_text_comes_out_whole():
    unit = "temp\x1b[0m \u202eok\ud800 C:\\"
    text = unit * 20_000  # 300,000 characters
    shown = printable(text)
    assert shown == printable(unit) * 20_000
    assert len(shown) == 20_000 * len(printable(unit)) and shown.isprintable()
    plain = "x" * 1_000_000
    assert printable(plain) == plain


@given(st.text(st.characters(exclude_categories=()), max_size=200))
def test_any_text_shows_printable_once_and_for_all(text):
    shown = printable(text)
    assert shown.isprintable()
    assert printable(shown) == shown
    if "\\" not in text:
        assert read_back(shown) == text
    if not any("\ud800" <= ch <= "\udfff" for ch in text):  # else not UTF-8: shown as hex
        assert read_back(view_payload(text.encode(), limit=10**6).text) == text


def test_every_human_output_uses_the_one_escaper():
    hostile = "kiln-9\x1b[2J\u202e/temp\nBcc: x\ud800"
    expected = printable(hostile)
    assert expected == "kiln-9\\x1b[2J\\u202e/temp\\nBcc: x\\ud800"
    assert expected in headline(payload(stream=hostile))
    assert any(expected in text for _, text in text_lines(payload(stream=hostile)))
    assert expected in table(["stream"], [[hostile]], max_width=None)
    assert view_payload(hostile.replace("\ud800", "")).text == expected.replace("\\ud800", "")
