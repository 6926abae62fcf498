"""One bad message must never stop monitoring (issue 11).

Every input here goes through the real parsers, the real :class:`Pipeline` and a real SQLite
file. What must hold: nothing escapes as an exception, every refusal is a dead letter with a
reason code, everything else is stored, and the monitors equal what the store says (a restart
from the store gives the same state).
"""

from __future__ import annotations

import dataclasses
import json
import math
import sqlite3
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy
from limitwatch.config import FileSourceConfig, MqttSourceConfig
from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.ingest.files import KEPT_PREFIX, MAX_READ, FileTail
from limitwatch.ingest.payload import REASONS, PayloadError, RowParser, SourceParser
from limitwatch.model import Reading
from limitwatch.pipeline import Parsed, Pipeline, PipelineBroken
from limitwatch.stats.baseline import Baseline, BaselineError, fit_baseline
from limitwatch.store import Store

T0 = 1_798_761_600.0  # 2027-01-01T00:00:00Z
SETTINGS = MonitorSettings(learn_count=5, min_points=3, warn_points=3, rules="nelson,ewma,cusum")
ENGINE_REASONS = {
    "duplicate",
    "out-of-order",
    "not-finite",
    "below-lower-bound",
    "above-upper-bound",
    "off-scale",
}
WORKER_REASONS = {"unreadable-line", "line-too-long", "engine-error", "store-refused", "late"}


def pipeline(store: Store, stored_baseline=None) -> Pipeline:
    book = AlertBook(store, AlertPolicy())
    return Pipeline(store, lambda stream: SETTINGS, book, stored_baseline)


def mqtt_source() -> MqttSourceConfig:
    return MqttSourceConfig.model_validate(
        {
            "type": "mqtt",
            "name": "gateway",
            "host": "127.0.0.1",
            "client_id": "fuzz",
            "max_payload_bytes": 4096,
            "topics": [
                {
                    "filter": "gw/+/+",
                    "stream": "{2}/{3}",
                    "payload": "json",
                    "value": "v",
                    "time": "t",
                    "seq": "seq",
                }
            ],
        }
    )


def jsonl_source(folder: Path) -> FileSourceConfig:
    return FileSourceConfig.model_validate(
        {
            "type": "file",
            "name": "export",
            "glob": str(folder / "*.jsonl"),
            "format": "jsonl",
            "value": "v",
            "time": "t",
            "stream": "s",
            "seq": "seq",
        }
    )


def parse_message(parser: SourceParser, topic: str, payload: bytes, received: float) -> Parsed:
    """What the service's worker does with a delivery; only PayloadError may come out of the
    parser (anything else would be a parse-error dead letter: a bug to fix)."""
    try:
        reading = parser.parse(topic, payload, received)
    except PayloadError as exc:
        assert exc.reason_code in REASONS
        return Parsed("gateway", payload, error=exc.reason_code, detail=str(exc))
    return Parsed("gateway", payload, reading=reading)


def parse_lines(folder: Path, received: float) -> list[Parsed]:
    source = jsonl_source(folder)
    rows = RowParser(source, future_tolerance=300.0)
    items = []
    for line in FileTail("export", source.glob, "jsonl").poll({}):
        if line.record is None and line.error is None:
            continue  # a blank line: only the offset moves
        if line.record is None:
            parsed = Parsed("export", line.raw, error=line.reason, detail=str(line.error))
        else:
            try:
                parsed = Parsed("export", line.raw, reading=rows.parse(line.record, received))
            except PayloadError as exc:
                assert exc.reason_code in REASONS
                parsed = Parsed("export", line.raw, error=exc.reason_code, detail=str(exc))
        items.append(dataclasses.replace(parsed, position=(line.file_id, line.end_offset)))
    return items


def count(store: Store, table: str) -> int:
    return int(store.db.conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0])


def reason_codes(store: Store) -> list[str]:
    return [r[0].split(":")[0] for r in store.db.conn.execute("SELECT reason FROM dead_letters")]


def assert_monitors_match_the_store(store: Store, pipe: Pipeline) -> None:
    """A restart from the store gives every monitor exactly as it stands."""
    pipe.checkpoint_all(now=T0)
    again = pipeline(store)
    again.restore()
    assert {s: m.state() for s, m in again.monitors.items()} == {
        s: m.state() for s, m in pipe.monitors.items()
    }


# -- the fuzz / property test ------------------------------------------------------------------

POISON_NUMBERS = [
    1e308,
    -1e308,
    5e-324,
    0.0,
    math.nan,
    math.inf,
    "9" * 5000,
    "1e999",
    "\ud800",
    None,
    [],
    True,
]
IN_ORDER = "in order"
"""Stands for a good time stamp, filled in from the item's position so most readings are
in time order and streams get past learning into monitoring."""

good_numbers = st.floats(min_value=40.0, max_value=60.0).map(lambda v: round(v, 2))
values = st.one_of(*[good_numbers] * 4, st.sampled_from(POISON_NUMBERS))
times = st.one_of(
    *[st.just(IN_ORDER)] * 4,
    st.integers(0, 10_000).map(lambda i: T0 + 60.0 * i),
    st.sampled_from(["9999-12-31T23:59:59Z", "9" * 5000, -1, "\ud800", 1e300, "soon"]),
)
seqs = st.one_of(
    *[st.just(IN_ORDER)] * 6, st.none(), st.integers(0, 10_000), st.sampled_from(["9" * 5000, -5])
)
levels = st.one_of(
    *[st.sampled_from(["line-1", "line-2"])] * 6,
    st.text(min_size=1, max_size=300).filter(lambda t: "/" not in t and "+" not in t),
)


def record(draw, stream_key: str | None) -> dict:
    out = {"v": draw(values), "t": draw(times)}
    if stream_key is not None:
        out[stream_key] = "file-" + draw(levels) + "/temp"
    seq = draw(seqs)
    if seq is not None:
        out["seq"] = seq
    return out


def serialise(item: dict | bytes, position: int) -> bytes:
    if isinstance(item, bytes):
        return item
    if item["t"] == IN_ORDER:
        item = {**item, "t": T0 + 60.0 * position}
    if item.get("seq") == IN_ORDER:
        item = {**item, "seq": position}
    return json.dumps(item).encode()


def deep(depth: int) -> bytes:
    return b'{"v": ' + b"[" * depth + b"]" * depth + b"}"


@st.composite
def message(draw) -> tuple[str, dict | bytes]:
    topic = f"gw/{draw(levels)}/temp"
    kind = draw(st.sampled_from(["record"] * 6 + ["deep", "bytes"]))
    if kind == "deep":
        return topic, deep(draw(st.integers(500, 1500)))
    if kind == "bytes":
        return topic, draw(st.binary(max_size=200))
    return topic, record(draw, None)


@st.composite
def line(draw) -> dict | bytes:
    kind = draw(st.sampled_from(["record"] * 6 + ["deep", "bignum", "bytes"]))
    if kind == "deep":
        return deep(1000)
    if kind == "bignum":
        return b'{"s": "a/b", "t": 1798761600, "v": ' + b"9" * 5000 + b"}"
    if kind == "bytes":
        return draw(st.binary(max_size=200)).replace(b"\n", b" ")
    return record(draw, "s")


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow]
)  # fmt: skip
@given(
    messages=st.lists(message(), max_size=80),
    lines=st.lists(line(), max_size=60),
    batch=st.integers(1, 25),
)
def test_no_input_escapes_and_every_refusal_is_a_dead_letter_with_a_reason(
    messages, lines, batch
):
    received = T0 + 60.0 * 10_000
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        warm_up = [
            {"s": "file-line-1/temp", "v": 50.0 + i % 3, "t": IN_ORDER, "seq": IN_ORDER}
            for i in range(6)
        ]
        text = b"".join(serialise(x, i) + b"\n" for i, x in enumerate(warm_up + lines))
        (folder / "export.jsonl").write_bytes(text)
        with Store.open(folder / "fuzz.db", now=T0) as store:
            pipe = pipeline(store)
            parser = SourceParser(mqtt_source(), future_tolerance=300.0)
            # a few good readings first, so the fuzzed ones also meet monitored streams
            warm_up = [
                (f"gw/{level}/temp", {"v": 50.0 + i % 3, "t": IN_ORDER, "seq": IN_ORDER})
                for i in range(6)
                for level in ("line-1", "line-2")
            ]
            items = [
                parse_message(parser, t, serialise(p, i), received)
                for i, (t, p) in enumerate(warm_up + messages)
            ]
            items += parse_lines(folder, received)
            for start in range(0, len(items), batch):
                pipe.process(items[start : start + batch], now=received)
            assert not pipe.broken
            # every input is either a stored reading or a dead letter with a reason code
            assert count(store, "readings") + count(store, "dead_letters") == len(items)
            codes = reason_codes(store)
            assert all(codes)
            assert set(codes) <= set(REASONS) | ENGINE_REASONS | WORKER_REASONS
            assert_monitors_match_the_store(store, pipe)


# -- the engine: a reading that cannot be judged changes nothing -------------------------------


@pytest.mark.parametrize("value", [1e308, -1e308, 1e101])
def test_a_huge_value_on_a_monitored_stream_is_refused_and_changes_nothing(value):
    baseline = Baseline.from_limits(center=0.0, sigma=0.01)
    monitor = StreamMonitor("s", SETTINGS, baseline=baseline)
    for i in range(5):
        assert monitor.update(Reading("s", T0 + i, 0.001 * i)).accepted
    before = monitor.state()
    outcome = monitor.update(Reading("s", T0 + 10, value))
    assert (outcome.accepted, outcome.reason) == (False, "off-scale")
    assert monitor.state() == before
    # and the stream goes on: the next real reading is judged as if nothing had come
    assert monitor.update(Reading("s", T0 + 11, 0.5)).signals


def test_a_learning_stream_refuses_a_moving_range_that_overflows():
    monitor = StreamMonitor("s", SETTINGS)
    assert monitor.update(Reading("s", T0, 1e308)).accepted  # on its own, a finite value
    before = monitor.state()
    outcome = monitor.update(Reading("s", T0 + 1, -1e308))
    assert (outcome.accepted, outcome.reason) == (False, "off-scale")
    assert monitor.state() == before


@pytest.mark.parametrize("sigma", [5e-324, 1e-310, 0.0, -1.0, math.inf, math.nan])
def test_baselines_whose_sigma_is_not_a_normal_positive_number_are_refused(sigma):
    with pytest.raises(BaselineError, match="normal positive number"):
        Baseline.from_limits(center=1.0, sigma=sigma)
    good = Baseline.from_limits(center=1.0, sigma=0.5).to_dict()
    with pytest.raises(BaselineError, match="normal positive number"):
        Baseline.from_dict({**good, "sigma": sigma})  # loaded from the store or a checkpoint
    monitor = StreamMonitor("press-4/force", SETTINGS)
    unchecked = Baseline.from_limits(center=1.0, sigma=0.5)
    object.__setattr__(unchecked, "sigma", sigma)
    with pytest.raises(BaselineError, match="press-4/force"):
        monitor.set_baseline(unchecked)
    assert monitor.baseline is None


def test_a_fit_whose_sigma_would_be_subnormal_is_refused_and_learning_goes_on():
    tiny = [0.0, 5e-324] * 10
    with pytest.raises(BaselineError, match="normal positive number"):
        fit_baseline(tiny, min_points=3, warn_points=3)
    monitor = StreamMonitor("s", SETTINGS)
    for i, v in enumerate(tiny):
        assert monitor.update(Reading("s", T0 + i, v)).accepted
    assert monitor.phase == "learning" and "normal positive" in (monitor.last_fit_error or "")


def test_a_typed_in_baseline_with_a_subnormal_sigma_is_a_config_error():
    from limitwatch.config import ConfigError, load_config

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "site.toml"
        path.write_text(
            '[[streams]]\nmatch = "press-*"\nbaseline = {center = 1.0, sigma = 1e-310}\n'
        )
        with pytest.raises(ConfigError, match="normal positive number"):
            load_config(path)


# -- the pipeline: a failure of one item is that item's dead letter ----------------------------


def _good(stream: str, i: int, value: float | None = None) -> Parsed:
    v = 50.0 + (i % 3) if value is None else value
    return Parsed("gateway", f"{stream} {i}".encode(), reading=Reading(stream, T0 + 60 * i, v))


def test_a_row_the_database_refuses_is_a_store_refused_dead_letter_and_the_rest_is_kept(fresh_db):
    """A site's trigger refuses one value (the database refuses that row and nothing else):
    the batch is applied again one item at a time; the refused reading is a dead letter and
    its stream's monitor is as if it never came."""
    fresh_db.db.conn.execute(
        "CREATE TRIGGER no_thirteen BEFORE INSERT ON readings WHEN NEW.value = 13.0 "
        "BEGIN SELECT RAISE(ABORT, 'a value of 13 is refused here'); END"
    )
    pipe = pipeline(fresh_db)
    batch = [_good("a", i) for i in range(8)] + [_good("b", i) for i in range(8)]
    batch.insert(5, _good("a", 100, 13.0))
    batch.append(_good("a", 101))
    result = pipe.process(batch, now=T0)
    assert [reason for _, reason in result.dead] == ["store-refused"]
    assert count(fresh_db, "readings") == 17 and len(result.outcomes) == 17
    (letter,) = fresh_db.dead_letters()
    assert letter.reason.startswith("store-refused: stream 'a'")
    assert "13 is refused" in letter.reason
    # the readings of "a" after the refused one were judged by a monitor that never saw it
    alone = StreamMonitor("a", SETTINGS)
    for item in batch:
        if item.reading.stream == "a" and item.reading.value != 13.0:
            alone.update(item.reading)
    assert pipe.monitors["a"].state() == alone.state()
    assert_monitors_match_the_store(fresh_db, pipe)
    # later batches go as one again
    assert pipe.process([_good("b", 50)], now=T0).dead == []


def test_an_engine_failure_is_an_engine_error_dead_letter_naming_the_stream(fresh_db, caplog):
    """A stored baseline written before sigma was checked (subnormal) cannot be loaded; the
    readings of its stream are dead letters that say why, and every other stream goes on."""
    numbers = Baseline.from_limits(center=1.0, sigma=0.5).to_dict()
    with fresh_db.transaction():
        fresh_db.add_baseline(
            "old/flow", {**numbers, "sigma": 5e-324}, now=T0, by="ana", reason="r", method="mean"
        )

    def stored(stream: str) -> Baseline | None:
        row = fresh_db.current_baseline(stream)
        return None if row is None else Baseline.from_dict(row.numbers)

    pipe = pipeline(fresh_db, stored)
    result = pipe.process([_good("new/flow", 1), _good("old/flow", 2), _good("new/flow", 3)], T0)
    assert [reason for _, reason in result.dead] == ["engine-error"]
    assert count(fresh_db, "readings") == 2
    (letter,) = fresh_db.dead_letters()
    assert "'old/flow'" in letter.reason and "normal positive number" in letter.reason
    assert "old/flow" not in pipe.monitors
    # decided inside the batch (nothing had moved), not by applying it again item by item
    assert "one at a time" not in caplog.text and "no monitor can be made" in caplog.text


def _spoil_run_count(state: dict) -> None:
    """Edit a checkpoint the way a careless hand would: the run-one-side count becomes text,
    which the restore takes as it is and the next reading trips over."""
    position = list(SETTINGS.plan.order).index("run-one-side")
    state["states"][position][0] = "eight"


def test_an_engine_failure_after_the_monitor_moved_is_undone_from_the_store(fresh_db, caplog):
    """A checkpoint edited by hand (a run count that is not a number): the detectors raise
    after the monitor moved. The batch is applied again one item at a time, the monitor is
    rebuilt from the store, and only that reading is a dead letter."""
    pipe = pipeline(fresh_db)
    pipe.process([_good("a", i) for i in range(10)], now=T0)
    pipe.checkpoint_all(now=T0)
    state = fresh_db.load_checkpoint("a")
    assert state is not None and state["baseline"] is not None
    _spoil_run_count(state)
    with fresh_db.transaction():
        fresh_db.save_checkpoint("a", state, now=T0)
    again = pipeline(fresh_db)
    again.restore()
    before = again.monitors["a"].state()
    result = again.process([_good("b", 1), _good("a", 20), _good("b", 2)], now=T0)
    assert [reason for _, reason in result.dead] == ["engine-error"]
    assert [o.reading.stream for o in result.outcomes] == ["b", "b"]
    (letter,) = fresh_db.dead_letters()
    assert "stream 'a'" in letter.reason and "TypeError" in letter.reason
    assert again.monitors["a"].state() == before
    assert "one at a time" in caplog.text


def test_a_checkpoint_that_cannot_be_caught_up_does_not_stop_the_start(fresh_db, caplog):
    """The same hand-edited checkpoint, with readings committed after it: a restart cannot
    apply them, says so, and starts that stream afresh; the other streams are restored."""
    pipe = pipeline(fresh_db)
    pipe.process([_good("a", i) for i in range(10)] + [_good("b", i) for i in range(3)], T0)
    pipe.checkpoint_all(now=T0)
    state = fresh_db.load_checkpoint("a")
    assert state is not None
    _spoil_run_count(state)
    with fresh_db.transaction():
        fresh_db.save_checkpoint("a", state, now=T0)
    pipe.process([_good("a", 10)], now=T0)  # committed after the checkpoint, not in it
    again = pipeline(fresh_db)
    assert again.restore() == 1 and set(again.monitors) == {"b"}
    assert "stream a: the readings after its checkpoint cannot be applied" in caplog.text


def test_a_failure_of_the_store_itself_still_breaks_the_pipeline(fresh_db):
    pipe = pipeline(fresh_db)
    pipe.process([_good("a", 1)], now=T0)
    fresh_db.db.conn.execute("PRAGMA query_only = 1")  # every write now fails in SQLite
    with pytest.raises(PipelineBroken, match=r"readonly|attempt to write"):
        pipe.process([_good("a", 2)], now=T0)
    assert pipe.broken


def test_a_dead_letter_reason_holding_a_lone_surrogate_is_stored_escaped(fresh_db):
    """A file name that is not UTF-8 reaches Python as lone surrogates, and the dead letter's
    reason names the file; it must still commit."""
    pipe = pipeline(fresh_db)
    item = Parsed("export", b"{", error="unreadable-line", detail="/data/\udcff.jsonl: not JSON")
    assert pipe.process([item, _good("a", 1)], now=T0).dead == [("export", "unreadable-line")]
    (letter,) = fresh_db.dead_letters()
    assert letter.reason == "unreadable-line: /data/\\udcff.jsonl: not JSON"
    assert count(fresh_db, "readings") == 1


# -- the file reader: an overlong line does not stop its file ----------------------------------


def test_a_line_over_the_limit_is_a_dead_letter_and_reading_goes_on(tmp_path):
    path = tmp_path / "a.jsonl"
    long_line = b'{"s": "' + b"x" * (MAX_READ + 10) + b'"}\n'
    path.write_bytes(b'{"v": 1}\n' + long_line + b'{"v": 2}\n')
    source = FileTail("f", str(tmp_path / "*.jsonl"), "jsonl")
    offsets: dict[str, int] = {}
    got = []
    for _ in range(3):
        for line in source.poll(offsets):
            offsets[line.file_id] = line.end_offset
            got.append(line)
    assert [x.record for x in got] == [{"v": 1}, None, {"v": 2}]
    overlong = got[1]
    assert overlong.reason == "line-too-long" and len(overlong.raw) == KEPT_PREFIX
    assert (overlong.start, overlong.end_offset) == (9, 9 + len(long_line))
    assert list(offsets.values()) == [path.stat().st_size]


def test_an_overlong_line_still_being_written_waits_for_its_end(tmp_path):
    path = tmp_path / "a.jsonl"
    path.write_bytes(b"x" * (MAX_READ + 5))
    source = FileTail("f", str(tmp_path / "*.jsonl"), "jsonl")
    assert list(source.poll({})) == []
    with path.open("ab") as f:
        f.write(b"\n")
    (line,) = list(source.poll({}))
    assert line.reason == "line-too-long" and line.end_offset == MAX_READ + 6


def test_json_lines_that_broke_the_reader_are_unreadable_lines(tmp_path):
    path = tmp_path / "a.jsonl"
    deep = b'{"v": ' + b"[" * 1000 + b"]" * 1000 + b"}"
    big = b'{"v": ' + b"9" * 5000 + b"}"
    path.write_bytes(deep + b"\n" + big + b"\n" + b'{"v": 3}\n')
    got = list(FileTail("f", str(tmp_path / "*.jsonl"), "jsonl").poll({}))
    assert [(x.record, x.reason) for x in got][2] == ({"v": 3}, "unreadable-line")
    assert "nest too deeply" in (got[0].error or "") and "digits" in (got[1].error or "")


def test_sqlite_refuses_a_lone_surrogate_so_the_parser_must():
    """Why stream ids are checked: the database cannot take such a string at all."""
    conn = sqlite3.connect(":memory:")
    with pytest.raises(UnicodeEncodeError):
        conn.execute("SELECT ?", ("\ud800",))


def test_a_stream_template_whose_own_text_is_no_stream_id_is_a_config_error():
    from limitwatch.config import MqttTopic

    def entry(template: str) -> MqttTopic:
        return MqttTopic.model_validate({"filter": "a/+", "stream": template, "payload": "number"})

    with pytest.raises(ValueError, match=r"control character U\+0007"):
        entry("site\a/{2}")
    with pytest.raises(ValueError, match="characters long"):
        entry("x" * 300 + "{2}")
    assert entry("site/{2}").stream == "site/{2}"
