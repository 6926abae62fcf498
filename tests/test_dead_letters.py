"""What the service refused, and why: the dead-letters command, the rate-limited log line, the
header warning of a file source and clean stored reasons, with a real SQLite file and the real
`limitwatch serve` process."""

from __future__ import annotations

import json
import logging
import re
import time

from hypothesis import given
from hypothesis import strategies as st

from limitwatch.ingest.files import FileTail
from limitwatch.payloadview import view_payload
from limitwatch.refusals import RefusalLog
from limitwatch.store import Store
from tests.helpers import run_cli
from tests.service_harness import ServiceProcess, query, wait_until
from tests.test_service_files import T0, file_config, write_rows

# -- the log line ----------------------------------------------------------------------------


def test_refusals_are_logged_once_per_source_and_reason_per_minute_with_their_count():
    lines: list[str] = []
    log = RefusalLog(every=60.0, emit=lines.append)
    for second in range(0, 180):  # one bad payload a second for three minutes
        log.note("gateway", "bad-json", now=float(second))
    log.note("export", "not-a-number", now=5.0)
    log.flush(now=240.0)
    gateway = [line for line in lines if line.startswith("source gateway")]
    # the first at once, then at 60 and 120 (59 + 1 each... counted since the last line)
    assert len(gateway) == 4, gateway
    counts = [int(m.group(1)) for m in map(re.compile(r": (\d+) more").search, gateway) if m]
    assert sum(counts) == 179  # every refusal but the first is counted exactly once
    assert len([line for line in lines if line.startswith("source export")]) == 1
    assert all("limitwatch dead-letters --source" in line for line in lines)


def test_nothing_more_is_logged_for_a_pair_that_stopped():
    lines: list[str] = []
    log = RefusalLog(every=60.0, emit=lines.append)
    log.note("gateway", "oversize", now=0.0)
    log.flush(now=1000.0)
    assert len(lines) == 1


# -- showing payloads safely -------------------------------------------------------------------


def test_control_characters_are_escaped_and_binary_is_hex():
    view = view_payload(b"gw/t\n\x1b[31mred\x07")
    assert view.encoding == "text" and "\x1b" not in view.text and "\\x1b" in view.text
    assert view.text == "gw/t\\n\\x1b[31mred\\x07"
    binary = view_payload(b"\xff\xfe\x00\x01")
    assert (binary.encoding, binary.text) == ("hex", "fffe0001")
    long = view_payload("é" * 300, limit=11)  # the cut lands inside a two-byte character
    assert long.cut and long.size == 600 and long.text == "é" * 5
    assert "600 bytes in all" in long.one_line()


@given(st.binary(max_size=300))
def test_any_payload_shows_as_printable_text_of_bounded_length(raw):
    line = view_payload(raw, limit=64).one_line()
    assert line.isprintable()
    assert len(line) <= 4 * 64 + 40  # every byte at worst as \xNN, plus the size note


# -- file sources: line numbers and the header warning --------------------------------------


def test_file_lines_carry_their_line_numbers_across_polls_and_restarts(tmp_path):
    path = tmp_path / "a.csv"
    path.write_text("time,value\n1,5\n\n2,6\n")
    source = FileTail("export", str(tmp_path / "*.csv"), "csv")
    offsets: dict[str, int] = {}
    first = list(source.poll(offsets))
    assert [(line.line, line.raw) for line in first] == [
        (1, b""),
        (2, b"1,5\n"),
        (3, b"\n"),
        (4, b"2,6\n"),
    ]
    offsets[first[-1].file_id] = first[-1].end_offset
    with path.open("a") as f:
        f.write("3,7\n")
    assert [line.line for line in source.poll(offsets)] == [5]
    restarted = FileTail("export", str(tmp_path / "*.csv"), "csv")  # counts the file once
    assert [line.line for line in restarted.poll(offsets)] == [5]


def test_a_header_without_the_configured_column_is_warned_about_once(tmp_path, caplog):
    (tmp_path / "a.csv").write_text("time,reading\n1,5\n2,6\n")
    source = FileTail(
        "export", str(tmp_path / "*.csv"), "csv", columns={"value": "value", "time": "time"}
    )
    with caplog.at_level(logging.WARNING, logger="limitwatch.files"):
        list(source.poll({}))
        list(source.poll({}))
    warnings = [r.getMessage() for r in caplog.records if "has no column" in r.getMessage()]
    assert len(warnings) == 1
    assert "value = 'value'" in warnings[0] and "time, reading" in warnings[0]


# -- the command ------------------------------------------------------------------------------


def fill(db_path) -> None:
    now = time.time()
    with Store.open(db_path, now=now) as store, store.transaction():
        store.add_dead_letter(
            "gateway", b"plant/l1/t\n\x1b[2Jnot json", "bad-json: Expecting value", now=now - 7200
        )
        store.add_dead_letter("gateway", b"plant/l1/t\n" + b"9" * 5000, "oversize", now=now - 60)
        store.add_dead_letter(
            "export", b"\xff\xfe1,2\n", "unreadable-line: a.csv, line 3: not UTF-8", now=now - 30
        )
        store.add_dead_letter(
            "gateway", b"plant/l1/t\n{}", "missing-field: value field 'v'", now=now - 10
        )


def test_dead_letters_lists_filters_and_shows_payloads_safely(tmp_path):
    db = tmp_path / "lw.db"
    fill(db)
    out = run_cli("dead-letters", "--db", str(db))
    assert out.returncode == 0, out.stderr
    assert "\x1b" not in out.stdout and "\\x1b[2Jnot json" in out.stdout
    assert "hex:fffe312c320a" in out.stdout
    assert "(5011 bytes in all)" in out.stdout
    assert "a.csv, line 3: not UTF-8" in out.stdout
    assert "4 refused input(s)" in out.stdout and "gateway bad-json 1" in out.stdout

    only = run_cli("dead-letters", "--db", str(db), "--source", "gateway", "--since", "1h")
    assert only.returncode == 0, only.stderr
    assert "oversize" in only.stdout and "missing-field" in only.stdout
    assert "bad-json" not in only.stdout and "export" not in only.stdout

    data = json.loads(
        run_cli(
            "dead-letters", "--db", str(db), "--reason", "bad-json", "--format", "json"
        ).stdout
    )
    assert [d["reason"] for d in data["dead_letters"]] == ["bad-json"]
    letter = data["dead_letters"][0]
    assert letter["detail"] == "Expecting value"
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ?.*", letter["received_at"])
    assert data["counts"] == [{"source": "gateway", "reason": "bad-json", "count": 1}]

    nothing = run_cli("dead-letters", "--db", str(db), "--reason", "duplicate")
    assert nothing.returncode == 0 and "No inputs refused as duplicate" in nothing.stdout
    bad = run_cli("dead-letters", "--db", str(db), "--since", "yesterday-ish")
    assert bad.returncode == 2 and "--since" in bad.stderr


# -- the real service --------------------------------------------------------------------------


def test_the_service_stores_clean_reasons_and_logs_refusals_once(tmp_path):
    config = file_config(tmp_path, poll="1s")
    data = tmp_path / "data"
    rows = [(T0 + 60 * i, "press-1/cycle-time", 20.0 + (i % 3)) for i in range(5)]
    write_rows(data / "export.csv", rows)
    with (data / "export.csv").open("a") as f:
        for i in range(5):
            f.write(f"2026-01-01T01:0{i}:00Z,press-1/cycle-time,lots\n")  # lines 7..11
        f.write("2026-01-01T00:04:00Z,press-1/cycle-time,21.0\n")  # line 12: the 5th again
    (data / "other.csv").write_text("time,stream,reading\n2026-01-01T00:00:00Z,a,1\n")
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    try:
        wait_until(
            lambda: len(query(db, "SELECT 1 FROM dead_letters")) == 7, what="seven dead letters"
        )
    finally:
        assert svc.stop() == 0
    reasons = [r[0] for r in query(db, "SELECT reason FROM dead_letters ORDER BY id")]
    numbers = [r for r in reasons if r.startswith("not-a-number")]
    assert numbers[0].startswith(f"not-a-number: {data / 'export.csv'}, line 7: ")
    assert all(r.count("not-a-number") == 1 for r in numbers), numbers
    assert sorted(int(re.search(r"line (\d+)", r).group(1)) for r in numbers) == [7, 8, 9, 10, 11]
    duplicate = next(r for r in reasons if r.startswith("duplicate"))
    assert "at 2026-01-01T00:04:00Z" in duplicate, duplicate
    logs = svc.logs()
    assert logs.count("an input was refused as not-a-number") == 1, logs
    assert "has no column for value = 'value'" in logs
