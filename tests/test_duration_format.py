"""One duration formatter: every span limitwatch writes for people (log lines, notices, charts)
comes from limitwatch.durations, so the same span reads the same everywhere, above an hour too,
and can be pasted back into a config."""

from __future__ import annotations

import re
from pathlib import Path

from hypothesis import given
from hypothesis import strategies as st

from limitwatch.alerts.delivery_watch import DeliveryWatch
from limitwatch.clocks import describe_step
from limitwatch.durations import format_duration, format_elapsed, parse_duration
from limitwatch.refusals import RefusalLog

SRC = Path(__file__).parents[1] / "src" / "limitwatch"


@given(st.floats(min_value=-1e3, max_value=1e9, allow_nan=False))
def test_an_elapsed_span_reads_back_as_its_whole_seconds(seconds):
    text = format_elapsed(seconds)
    assert parse_duration(text) == max(0, round(seconds))
    assert text == format_duration(max(0, round(seconds)))


def test_spans_above_an_hour_read_alike_in_every_log_line():
    span = 3 * 3600 + 5 * 60 + 7  # 3h5m7s: the two old formatters said "3h5m" and "3h05m"
    expected = "3h5m7s"
    assert format_elapsed(span) == expected

    refusals: list[str] = []
    RefusalLog(every=span, emit=refusals.append).note("gateway", "bad-json", now=0.0)
    assert f"at most every {expected}" in refusals[0]

    deliveries: list[str] = []
    watch = DeliveryWatch(["ops-hook"], emit=deliveries.append)
    watch.record("ops-hook", "retry", 1000.0, "connection refused")
    watch.record("ops-hook", "delivered", 1000.0 + span)
    assert f"delivers again after {expected} of failures" in deliveries[1]

    assert describe_step(-span) == f"back by {expected} ({span:.1f} s)"


def test_a_refusal_window_counts_in_the_same_words():
    lines: list[str] = []
    log = RefusalLog(every=60.0, emit=lines.append)
    log.note("gateway", "bad-json", now=0.0)
    log.note("gateway", "bad-json", now=4000.0)
    assert "refused as bad-json in the last 1h6m40s" in lines[1]


def test_no_module_formats_hours_and_minutes_by_hand():
    """A second formatter would start with splitting seconds into minutes or hours."""
    by_hand = re.compile(r"divmod\([^)]*,\s*(60|3600)\)|//\s*(60|3600)\b|%\s*60\b")
    found = [
        f"{path.relative_to(SRC)}:{number}"
        for path in SRC.rglob("*.py")
        if path.name != "durations.py"
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1)
        if by_hand.search(line)
    ]
    assert found == [], f"format durations with limitwatch.durations instead: {found}"
