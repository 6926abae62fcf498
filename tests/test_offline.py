"""A source's "this sender went offline" item (a Sparkplug death) through the real pipeline and
a real SQLite file: the stale incident opens in the batch that holds it, with the cause in the
words people read; a reading after it in the same batch cancels it, a later one clears it."""

from __future__ import annotations

from pathlib import Path

from limitwatch.alerts.lifecycle import AlertBook
from limitwatch.alerts.messages import notification_payload, text_lines
from limitwatch.alerts.policy import AlertPolicy, Notice
from limitwatch.engine import MonitorSettings
from limitwatch.ingest.base import Parsed
from limitwatch.model import Reading
from limitwatch.pipeline import Pipeline
from limitwatch.store import Store

PRESS = ("plant-a/press-1/oil/temp", "plant-a/press-1/ram/force")
CAUSE = "the edge node plant-a/press-1 reported offline (NDEATH)"


def _pipeline(store: Store) -> Pipeline:
    settings = MonitorSettings(learn_count=10, min_points=10, rules="limits")
    return Pipeline(store, lambda s: settings, AlertBook(store, AlertPolicy(clear_after=5)))


def _reading(stream: str, i: int) -> Parsed:
    value = 40.0 + (i * 7 % 5) * 0.1  # in control: no incident of its own
    return Parsed("presses", b"x", Reading(stream, 1000.0 + 60.0 * i, value))


def _death(streams: tuple[str, ...] = PRESS) -> Parsed:
    return Parsed("presses", b"spBv1.0/plant-a/NDEATH/press-1\n", offline=streams, detail=CAUSE)


def _fed(pipe: Pipeline, count: int = 12) -> None:
    for i in range(count):
        pipe.process([_reading(s, i) for s in PRESS], now=5000.0)


def test_a_death_opens_stale_incidents_in_its_own_batch_with_the_cause(tmp_path: Path) -> None:
    with Store.open(tmp_path / "lw.db", now=0.0) as store:
        pipe = _pipeline(store)
        _fed(pipe)
        never = "plant-a/press-1/never-read"
        result = pipe.process([_death((*PRESS, never))], now=9000.0)
        assert not result.dead  # no dead letter of its own (the source gives that separately)
        live = {a.stream: a for a in store.live_alerts()}
        assert sorted(live) == sorted(PRESS)  # a stream never read has no monitor and no alert
        last = 1000.0 + 60.0 * 11
        for alert in live.values():
            assert alert.rule == "stale" and alert.silent_since == last
            assert alert.signal["cause"] == CAUSE and alert.signal["limit"] is None
            body = notification_payload(alert, Notice("opened", 0), 9000.0)
            assert CAUSE in body["rule_words"]
            text = dict(text_lines(body))
            assert CAUSE in text["what"]
            assert "at 1970-01-01T00:27:40Z" in text["last reading"]  # 1000 s + 11 minutes
        assert never not in pipe.monitors

        # the rebirth's data clears them, as any recent reading clears a stale incident
        pipe.process([_reading(s, 12) for s in PRESS], now=9100.0)
        assert store.live_alerts() == []
        cleared = store.alerts(state="cleared")
        assert sorted(a.stream for a in cleared) == sorted(PRESS)


def test_a_reading_after_the_death_in_the_same_batch_cancels_it(tmp_path: Path) -> None:
    with Store.open(tmp_path / "lw.db", now=0.0) as store:
        pipe = _pipeline(store)
        _fed(pipe)
        pipe.process([_death(), _reading(PRESS[0], 12)], now=9000.0)
        assert [a.stream for a in store.live_alerts()] == [PRESS[1]]


def test_a_reading_before_the_death_in_the_same_batch_does_not(tmp_path: Path) -> None:
    with Store.open(tmp_path / "lw.db", now=0.0) as store:
        pipe = _pipeline(store)
        _fed(pipe)
        pipe.process([_reading(PRESS[0], 12), _death()], now=9000.0)
        live = {a.stream: a for a in store.live_alerts()}
        assert sorted(live) == sorted(PRESS)
        assert live[PRESS[0]].silent_since == 1000.0 + 60.0 * 12


def test_the_stale_check_repeating_the_silence_keeps_the_cause(tmp_path: Path) -> None:
    with Store.open(tmp_path / "lw.db", now=0.0) as store:
        pipe = _pipeline(store)
        _fed(pipe)
        pipe.process([_death()], now=9000.0)
        signals = pipe.stale_signals(9600.0, lambda s: (60.0, 3.0))
        assert len(signals) == 2 and all(s.cause is None for s in signals)
        pipe.book.apply_signals(signals, 9600.0)
        for alert in store.live_alerts():
            assert alert.signal_count == 2
            assert alert.signal["cause"] == CAUSE
            assert CAUSE in notification_payload(alert, Notice("reminder", 1), 9600.0)["rule_words"]


def test_an_offline_item_in_a_batch_applied_one_at_a_time_still_opens_them(tmp_path: Path) -> None:
    """A batch the database refuses a row of is applied again item by item: the death's
    stale incidents open there too, after the readings before it."""
    with Store.open(tmp_path / "lw.db", now=0.0) as store:
        pipe = _pipeline(store)
        _fed(pipe)
        store.db.conn.execute(
            "CREATE TRIGGER no_thirteen BEFORE INSERT ON readings WHEN NEW.value = 13.0 "
            "BEGIN SELECT RAISE(ABORT, 'a value of 13 is refused here'); END"
        )
        refused = Parsed("presses", b"13", Reading(PRESS[0], 1000.0 + 60.0 * 12, 13.0))
        result = pipe.process([_reading(PRESS[1], 12), refused, _death()], now=9000.0)
        assert [reason for _, reason in result.dead] == ["store-refused"]
        assert result.opened == 2 and len(result.signals) == 2
        live = {a.stream: a for a in store.live_alerts()}
        assert sorted(live) == sorted(PRESS)
        assert live[PRESS[1]].silent_since == 1000.0 + 60.0 * 12
        assert live[PRESS[0]].silent_since == 1000.0 + 60.0 * 11  # the refused one never counted


def test_a_death_joins_a_live_incident_and_says_why_under_its_stale_rule(tmp_path: Path) -> None:
    with Store.open(tmp_path / "lw.db", now=0.0) as store:
        pipe = _pipeline(store)
        _fed(pipe)
        wild = Parsed("presses", b"wild", Reading(PRESS[0], 1000.0 + 60.0 * 12, 90.0))
        pipe.process([wild], now=9000.0)
        pipe.process([_death((PRESS[0],))], now=9100.0)
        (alert,) = store.live_alerts()
        assert {"beyond-limits", "stale"} <= set(alert.rules)
        body = notification_payload(alert, Notice("opened", 0), 9100.0)
        words = {r["rule"]: r["words"] for r in body["rules"]}
        assert CAUSE in words["stale"] and CAUSE not in words["beyond-limits"]
