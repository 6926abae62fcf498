"""The incident lifecycle, driven by explicit times against a real SQLite file.

Signals and outcomes are built by hand, so each test states exactly which readings arrive when.
A stream has one live incident at a time; every rule that signals while it lives joins it.
The shelving behaviour follows the idea of shelving in ANSI/ISA-18.2-2016 (cited from memory): a
shelved alarm is still tracked, and if it is still active when the shelf ends it is announced.
"""

from __future__ import annotations

import itertools
import json
import math
import tempfile
from dataclasses import replace
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from limitwatch import SAFETY_CAUTION
from limitwatch.alerts.lifecycle import (
    RULE_WORDS,
    AlertBook,
    AlertPolicy,
    Notice,
    SeverityRule,
    covering_shelf,
    decide,
    held_until,
    notices_due,
)
from limitwatch.model import Outcome, Reading, StreamSignal
from limitwatch.store import Alert, Shelf, Store
from tests.helpers import examples

T0 = 1_700_000_000.0

BOTH_BACKENDS = True  # tests taking fresh_db run on SQLite and on PostgreSQL
STREAM = "line-2/gearbox-temp"
POLICY = AlertPolicy(clear_after=3, repeat_every_s=600.0, escalate_after_s=1800.0)


def sig(
    rule: str = "beyond-limits",
    t: float = T0,
    value: float = 91.0,
    *,
    stream: str = STREAM,
    chart: str = "x",
) -> StreamSignal:
    return StreamSignal(
        stream=stream,
        rule=rule,
        chart=chart,  # type: ignore[arg-type]
        side="upper",
        index=int(t - T0),
        time=t,
        value=value,
        involved=(int(t - T0),),
        center=80.0,
        sigma=3.0,
        ucl=89.0,
        lcl=71.0,
        mr=value - 80.0,
        mr_ucl=11.06,
        baseline_version=2,
    )


def reading(
    t: float,
    *signals: StreamSignal,
    value: float = 80.0,
    stream: str = STREAM,
    phase: str = "monitoring",
    accepted: bool = True,
) -> Outcome:
    return Outcome(
        reading=Reading(stream, t, signals[0].value if signals else value),
        accepted=accepted,
        reason=None if accepted else "out-of-order",
        index=int(t - T0),
        phase=phase,  # type: ignore[arg-type]
        signals=signals,
    )


def hit(t: float, rule: str = "beyond-limits", stream: str = STREAM) -> Outcome:
    """A monitoring reading at ``t`` on which ``rule`` fired."""
    return reading(t, sig(rule, t, stream=stream), stream=stream)


def quiet(t: float, stream: str = STREAM) -> Outcome:
    return reading(t, stream=stream)


def rows(store: Store) -> list[tuple[str, str]]:
    """(idempotency key, route) of every outbox row, oldest first."""
    return [(n.idempotency_key, n.route) for n in store.notifications()]


def kinds(store: Store, alert_id: int) -> list[str]:
    return [e.kind for e in store.alert_events(alert_id)]


@pytest.fixture
def book(fresh_db: Store) -> AlertBook:
    return AlertBook(fresh_db, POLICY)


# --------------------------------------------------------------------------- opening, debounce


def test_a_first_signal_opens_an_alert_and_queues_one_notification(book: AlertBook):
    report = book.apply([quiet(T0 - 60), hit(T0)], now=T0 + 1)
    (alert,) = book.store.alerts()
    assert (alert.state, alert.signal_count, alert.severity) == ("open", 1, "warning")
    assert (alert.first_time, alert.last_value, alert.opened_at) == (T0, 91.0, T0 + 1)
    assert rows(book.store) == [(f"{alert.id}:opened:0:default", "default")]
    assert kinds(book.store, alert.id) == ["opened", "notified"]
    assert (report.opened, report.queued) == (1, 1)


def test_the_payload_carries_reading_limits_rule_in_words_and_the_caution(book: AlertBook):
    book.apply([hit(T0)], now=T0 + 1)
    (note,) = book.store.notifications()
    p = note.payload
    assert p["event_id"] == f"{note.alert_id}:opened:0"
    assert (p["kind"], p["stream"], p["rule"], p["severity"]) == (
        "opened",
        STREAM,
        "beyond-limits",
        "warning",
    )
    assert (p["value"], p["time"], p["center"], p["lcl"], p["ucl"]) == (91.0, T0, 80.0, 71.0, 89.0)
    assert p["rule_words"] == RULE_WORDS["beyond-limits"]
    assert p["caution"] == SAFETY_CAUTION
    for fragment in ("91", "80", "71 to 89", RULE_WORDS["beyond-limits"], SAFETY_CAUTION):
        assert fragment in p["text"]
    json.dumps(p, allow_nan=False)  # strict JSON: what a webhook receiver can parse


def test_further_signals_count_but_do_not_notify_again(book: AlertBook):
    book.apply([hit(T0)], now=T0 + 1)
    report = book.apply([hit(T0 + 60), quiet(T0 + 120), hit(T0 + 180)], now=T0 + 181)
    (alert,) = book.store.alerts()
    assert (alert.signal_count, alert.last_time, alert.quiet_count) == (3, T0 + 180, 0)
    assert len(rows(book.store)) == 1
    assert kinds(book.store, alert.id) == ["opened", "notified"]
    assert (report.opened, report.repeated) == (0, 2)


def test_one_reading_counts_once_per_rule(book: AlertBook):
    twice = reading(T0, sig("beyond-limits", T0), sig("beyond-limits", T0))
    book.apply([twice], now=T0)
    (alert,) = book.store.alerts()
    assert alert.signal_count == 1


def test_different_rules_on_one_stream_join_one_incident_and_notify_once(book: AlertBook):
    # One sustained shift: five rules within five readings, one incident, one notification.
    rules = ["beyond-limits", "mr-beyond-limit", "two-of-three-zone-a", "four-of-five-zone-b"]
    batch = [reading(T0, sig(rules[0], T0), sig(rules[1], T0, chart="mr"))]
    batch += [reading(T0 + i, sig(r, T0 + i)) for i, r in enumerate(rules[2:], start=1)]
    batch += [hit(T0 + 3, "run-one-side"), hit(T0 + 4, "beyond-limits")]
    report = book.apply(batch, T0 + 5)
    (incident,) = book.store.alerts()
    assert incident.rule == "beyond-limits"  # the rule that opened it
    assert set(incident.rules) == {*rules, "run-one-side"}
    assert incident.rules["beyond-limits"].signal_count == 2
    assert (incident.rules["beyond-limits"].first_time, incident.last_time) == (T0, T0 + 4)
    assert incident.signal_count == 6
    assert rows(book.store) == [(f"{incident.id}:opened:0:default", "default")]
    assert kinds(book.store, incident.id).count("joined") == 4
    assert (report.opened, report.joined, report.repeated) == (1, 4, 1)


def test_a_joining_rule_notifies_only_when_it_raises_the_severity(fresh_db: Store):
    policy = replace(POLICY, severities=(SeverityRule("*", "run-one-side", "critical"),))
    book = AlertBook(fresh_db, policy)
    book.apply([hit(T0), hit(T0 + 1, "trend")], now=T0 + 1)
    assert [k.split(":")[1] for k, _ in rows(fresh_db)] == ["opened"]
    book.apply([hit(T0 + 2, "run-one-side"), hit(T0 + 3, "run-one-side")], now=T0 + 3)
    (incident,) = fresh_db.alerts()
    assert incident.severity == "critical"
    assert incident.rules["trend"].severity == "warning"
    assert [k.split(":")[1:3] for k, _ in rows(fresh_db)] == [["opened", "0"], ["raised", "2"]]
    raised = fresh_db.notifications()[1].payload
    assert raised["text"].startswith(f"Incident {incident.id} on {STREAM} is now critical")
    assert "raised" in kinds(fresh_db, incident.id)


def test_an_acknowledged_alert_keeps_counting_signals(book: AlertBook):
    book.apply([hit(T0)], now=T0)
    (alert,) = book.store.alerts()
    book.store.acknowledge(alert.id, by="m.chen", note="on it", now=T0 + 30)
    book.apply([hit(T0 + 60)], now=T0 + 60)
    (again,) = book.store.alerts()
    assert (again.id, again.state, again.signal_count) == (alert.id, "acknowledged", 2)
    # The acknowledgement itself is announced once, with who and the note; nothing more.
    assert [k.split(":")[1] for k, _ in rows(book.store)] == ["opened", "acknowledged"]
    ack = book.store.notifications()[1].payload
    assert (ack["acknowledged_by"], ack["ack_note"]) == ("m.chen", "on it")
    assert "acknowledged by m.chen" in ack["text"] and "on it" in ack["text"]
    book.apply([hit(T0 + 120)], now=T0 + 120)
    assert book.tick(T0 + 9999).queued == 0
    assert len(rows(book.store)) == 2


# --------------------------------------------------------------------------- hysteresis


def test_an_alert_clears_after_n_consecutive_quiet_monitoring_readings(book: AlertBook):
    book.apply([hit(T0), quiet(T0 + 60), quiet(T0 + 120)], now=T0 + 120)
    (alert,) = book.store.alerts()
    assert (alert.state, alert.quiet_count) == ("open", 2)
    report = book.apply([quiet(T0 + 180)], now=T0 + 180)
    cleared = book.store.alert(alert.id)
    assert (cleared.state, cleared.cleared_at, cleared.quiet_count) == ("cleared", T0 + 180, 3)
    assert kinds(book.store, alert.id)[-2:] == ["cleared", "notified"]  # and announced
    assert report.cleared == 1


def test_a_signal_restarts_the_quiet_count(book: AlertBook):
    book.apply([hit(T0), quiet(T0 + 1), quiet(T0 + 2), hit(T0 + 3)], now=T0 + 3)
    book.apply([quiet(T0 + 4), quiet(T0 + 5)], now=T0 + 5)
    (alert,) = book.store.alerts()
    assert (alert.state, alert.quiet_count) == ("open", 2)


def test_learning_phase_and_refused_readings_do_not_count_as_quiet(book: AlertBook):
    book.apply([hit(T0)], now=T0)
    book.apply(
        [
            reading(T0 + 1, phase="learning"),
            reading(T0 + 2, accepted=False),
            reading(T0 + 3, phase="learning"),
            quiet(T0 + 10, stream="another/stream"),
        ],
        now=T0 + 10,
    )
    (alert,) = book.store.alerts()
    assert (alert.state, alert.quiet_count) == ("open", 0)


def test_any_rule_firing_keeps_the_incident_live(book: AlertBook):
    book.apply([hit(T0, "trend")], now=T0)
    book.apply([hit(T0 + t, "beyond-limits") for t in (1, 2, 3)], now=T0 + 3)
    (incident,) = book.store.alerts()
    assert (incident.state, incident.quiet_count, set(incident.rules)) == (
        "open",
        0,
        {"trend", "beyond-limits"},
    )


def test_clearing_is_announced_with_how_long_it_lasted(book: AlertBook):
    book.apply([hit(T0), hit(T0 + 600)], now=T0 + 600)
    book.apply([quiet(T0 + 1200), quiet(T0 + 1800), quiet(T0 + 2400)], now=T0 + 2400)
    (incident,) = book.store.alerts()
    assert incident.state == "cleared"
    cleared = book.store.notifications()[-1].payload
    assert cleared["event_id"] == f"{incident.id}:cleared:0"
    assert cleared["lasted_s"] == 2400.0  # first signal to the reading that cleared it
    assert "it lasted 40m" in cleared["text"] and cleared["text"].endswith(SAFETY_CAUTION)


def test_a_signal_after_clearing_opens_a_new_alert_and_notifies(book: AlertBook):
    book.apply([hit(T0), quiet(T0 + 1), quiet(T0 + 2), quiet(T0 + 3)], now=T0 + 3)
    book.apply([hit(T0 + 4)], now=T0 + 4)
    newer, older = book.store.alerts()
    assert (older.state, newer.state, newer.signal_count) == ("cleared", "open", 1)
    assert newer.id != older.id
    assert rows(book.store) == [
        (f"{older.id}:opened:0:default", "default"),
        (f"{older.id}:cleared:0:default", "default"),
        (f"{newer.id}:opened:0:default", "default"),
    ]


def test_a_flapping_stream_stays_one_alert(book: AlertBook):
    # Signal on every other reading: never three quiet readings in a row, so one alert only.
    batch = [hit(T0 + t) if t % 2 == 0 else quiet(T0 + t) for t in range(40)]
    book.apply(batch, now=T0 + 40)
    (alert,) = book.store.alerts()
    assert (alert.state, alert.signal_count) == ("open", 20)
    assert len(rows(book.store)) == 1


# --------------------------------------------------------------------------- reminders, escalation


def test_reminders_come_at_the_repeat_interval(book: AlertBook):
    book.apply([hit(T0)], now=T0)
    (alert,) = book.store.alerts()
    assert book.tick(T0 + 599).queued == 0
    assert book.tick(T0 + 600).queued == 1
    assert book.tick(T0 + 600).queued == 0  # the same tick again owes nothing
    assert book.tick(T0 + 1199).queued == 0
    assert book.tick(T0 + 1200).queued == 1
    assert rows(book.store) == [
        (f"{alert.id}:opened:0:default", "default"),
        (f"{alert.id}:reminder:1:default", "default"),
        (f"{alert.id}:reminder:2:default", "default"),
    ]
    reminder = book.store.notifications()[2].payload
    assert (reminder["kind"], reminder["number"]) == ("reminder", 2)
    assert reminder["text"].startswith(f"Reminder 2: warning incident {alert.id} on {STREAM}")
    assert kinds(book.store, alert.id) == ["opened", "notified", "reminded", "reminded"]


def test_a_late_tick_sends_one_reminder_not_a_backlog(book: AlertBook):
    book.apply([hit(T0)], now=T0)
    book = AlertBook(book.store, AlertPolicy(repeat_every_s=600.0))
    assert book.tick(T0 + 10 * 600).queued == 1
    assert book.tick(T0 + 10 * 600 + 599).queued == 0


def test_no_reminders_when_the_repeat_interval_is_off(fresh_db: Store):
    book = AlertBook(fresh_db, AlertPolicy(repeat_every_s=None))
    book.apply([hit(T0)], now=T0)
    assert book.tick(T0 + 86400 * 7).queued == 0
    assert len(rows(fresh_db)) == 1


def test_escalation_goes_once_to_the_second_route(book: AlertBook):
    book.apply([hit(T0)], now=T0)
    (alert,) = book.store.alerts()
    book.tick(T0 + 1799)
    assert all(route == "default" for _, route in rows(book.store))
    book.tick(T0 + 1800)
    book.tick(T0 + 1800 + 600)
    book.tick(T0 + 1800 + 6000)
    escalations = [k for k, route in rows(book.store) if route == "escalation"]
    assert escalations == [f"{alert.id}:escalated:1:escalation"]
    assert kinds(book.store, alert.id).count("escalated") == 1
    payload = next(n.payload for n in book.store.notifications() if n.route == "escalation")
    assert payload["text"].startswith("Escalation: warning incident")


def test_acknowledging_stops_reminders_and_escalation(book: AlertBook):
    book.apply([hit(T0)], now=T0)
    (alert,) = book.store.alerts()
    book.tick(T0 + 600)
    book.store.acknowledge(alert.id, by="m.chen", now=T0 + 700)
    assert book.tick(T0 + 701).queued == 1  # the acknowledgement is announced
    for t in (1200, 1800, 3600, 86400):
        assert book.tick(T0 + t).queued == 0
    assert [k.split(":")[1] for k, _ in rows(book.store)] == [
        "opened",
        "reminder",
        "acknowledged",
    ]


# --------------------------------------------------------------------------- shelving


def test_a_shelf_holds_notifications_but_the_alert_is_recorded(book: AlertBook):
    book.store.shelve(STREAM, until=T0 + 3600, reason="bearing swap", by="r.diaz", now=T0 - 10)
    report = book.apply([hit(T0)], now=T0)
    (alert,) = book.store.alerts()
    assert alert.state == "open"
    assert rows(book.store) == []
    assert kinds(book.store, alert.id) == ["opened", "suppressed"]
    held = book.store.alert_events(alert.id)[-1]
    assert "bearing swap" in (held.note or "") and held.data == {
        "shelf_id": 1,
        "held": [f"{alert.id}:opened:0"],
    }
    assert (report.opened, report.suppressed, report.queued) == (1, 1, 0)
    # While shelved, reminders and the escalation are held too, without a new event per tick.
    for t in (600, 1200, 1800, 3599):
        assert book.tick(T0 + t).queued == 0
    assert kinds(book.store, alert.id) == ["opened", "suppressed"]


def test_when_the_shelf_expires_what_is_still_owed_goes_out_once(book: AlertBook):
    book.store.shelve(STREAM, until=T0 + 3600, reason="bearing swap", by="r.diaz", now=T0 - 10)
    book.apply([hit(T0)], now=T0)
    (alert,) = book.store.alerts()
    book.tick(T0 + 1800)
    assert book.tick(T0 + 3600).queued == 2
    assert rows(book.store) == [
        (f"{alert.id}:opened:0:default", "default"),
        (f"{alert.id}:escalated:1:escalation", "escalation"),
    ]
    assert book.tick(T0 + 3601).queued == 0
    assert book.tick(T0 + 4200).queued == 1  # reminders resume from the late notification


def test_an_alert_that_clears_during_the_shelf_never_notifies(book: AlertBook):
    book.store.shelve(STREAM, until=T0 + 3600, reason="bearing swap", by="r.diaz", now=T0 - 10)
    book.apply([hit(T0), quiet(T0 + 60), quiet(T0 + 120), quiet(T0 + 180)], now=T0 + 180)
    assert book.tick(T0 + 7200).queued == 0
    assert rows(book.store) == []


def test_a_rule_shelf_holds_an_incident_only_while_all_its_rules_are_shelved(book: AlertBook):
    book.store.shelve(STREAM, "trend", until=T0 + 3600, reason="ramp-up", by="x", now=T0 - 1)
    book.apply([hit(T0, "trend"), hit(T0 + 1, "trend")], now=T0 + 1)
    assert rows(book.store) == []
    # Another rule joins: the incident now says something the shelf does not cover.
    book.apply([hit(T0 + 2, "beyond-limits")], now=T0 + 2)
    (incident,) = book.store.alerts()
    assert rows(book.store) == [(f"{incident.id}:opened:0:default", "default")]


def test_a_shelf_on_another_stream_changes_nothing(book: AlertBook):
    book.store.shelve("line-9/other", until=T0 + 3600, reason="stop", by="x", now=T0 - 1)
    book.apply([hit(T0)], now=T0)
    assert len(rows(book.store)) == 1


def test_unshelving_early_releases_the_held_notification(book: AlertBook):
    book.store.shelve(STREAM, until=T0 + 3600, reason="bearing swap", by="r.diaz", now=T0 - 10)
    book.apply([hit(T0)], now=T0)
    book.store.unshelve(STREAM, by="r.diaz", now=T0 + 300)
    assert book.tick(T0 + 301).queued == 1
    (alert,) = book.store.alerts()
    assert kinds(book.store, alert.id) == ["opened", "suppressed", "unshelved", "notified"]


def test_a_longer_shelf_is_recorded_once_more(book: AlertBook):
    book.store.shelve(STREAM, until=T0 + 600, reason="first", by="x", now=T0 - 1)
    book.apply([hit(T0)], now=T0)
    book.store.shelve(STREAM, until=T0 + 7200, reason="extended", by="x", now=T0 + 500)
    book.tick(T0 + 700)
    book.tick(T0 + 800)
    (alert,) = book.store.alerts()
    assert kinds(book.store, alert.id) == ["opened", "suppressed", "shelved", "suppressed"]
    assert rows(book.store) == []


def test_an_acknowledged_alert_is_not_announced_when_its_shelf_ends(book: AlertBook):
    book.store.shelve(STREAM, until=T0 + 600, reason="swap", by="x", now=T0 - 1)
    book.apply([hit(T0)], now=T0)
    (alert,) = book.store.alerts()
    book.store.acknowledge(alert.id, by="y", now=T0 + 100)
    assert book.tick(T0 + 7200).queued == 0


# --------------------------------------------------------------------------- replay, atomicity


def test_a_replayed_batch_changes_nothing_and_enqueues_nothing_twice(book: AlertBook):
    batch = [hit(T0), hit(T0 + 60), quiet(T0 + 120)]
    book.apply(batch, now=T0 + 120)
    before = book.store.alerts()
    events = kinds(book.store, before[0].id)
    report = book.apply(batch, now=T0 + 500)
    assert book.store.alerts() == before
    assert kinds(book.store, before[0].id) == events
    assert len(rows(book.store)) == 1
    assert (report.opened, report.repeated, report.replayed) == (0, 0, 3)


def test_a_replay_after_clearing_does_not_reopen(book: AlertBook):
    batch = [hit(T0), quiet(T0 + 1), quiet(T0 + 2), quiet(T0 + 3)]
    book.apply(batch, now=T0 + 3)
    book.apply(batch, now=T0 + 10)
    (alert,) = book.store.alerts()
    assert alert.state == "cleared"
    assert [k.split(":")[1] for k, _ in rows(book.store)] == ["opened", "cleared"]


def test_a_rolled_back_batch_leaves_no_alert_and_the_retry_enqueues_once(book: AlertBook):
    with pytest.raises(RuntimeError), book.store.transaction():
        book.store.add_readings([hit(T0)], now=T0)
        book.apply([hit(T0)], now=T0)
        raise RuntimeError("process killed before commit")
    assert book.store.alerts() == [] and rows(book.store) == []
    with book.store.transaction():
        book.store.add_readings([hit(T0)], now=T0 + 5)
        book.apply([hit(T0)], now=T0 + 5)
    (alert,) = book.store.alerts()
    assert rows(book.store) == [(f"{alert.id}:opened:0:default", "default")]


def test_a_tick_rolled_back_then_retried_enqueues_once(book: AlertBook):
    book.apply([hit(T0)], now=T0)
    with pytest.raises(RuntimeError), book.store.transaction():
        book.tick(T0 + 600)
        raise RuntimeError("crash")
    book.tick(T0 + 600)
    book.tick(T0 + 601)
    assert [k.split(":")[1] for k, _ in rows(book.store)] == ["opened", "reminder"]


def _final_state(batches: list[list[Outcome]], replay: bool) -> tuple[list, list]:
    """Apply ``batches`` (each twice when ``replay``) to a new file; return what is left."""
    with tempfile.TemporaryDirectory() as tmp, Store.open(Path(tmp) / "p.db") as store:
        book = AlertBook(store, POLICY)
        for batch in batches:
            now = batch[-1].reading.time
            book.apply(batch, now=now)
            if replay:
                book.apply(batch, now=now + 1)
        alerts = [
            (a.stream, a.rule, a.state, a.signal_count, a.quiet_count, a.first_time, a.last_time)
            for a in reversed(store.alerts())
        ]
        return alerts, rows(store)


@settings(max_examples=examples(40), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    steps=st.lists(
        st.tuples(
            st.sampled_from(["line-1/a", "line-1/b"]),
            st.sets(st.sampled_from(["beyond-limits", "trend"]), max_size=2),
            st.booleans(),  # monitoring (True) or learning
        ),
        min_size=1,
        max_size=40,
    ),
    cuts=st.sets(st.integers(1, 39), max_size=6),
    replay=st.booleans(),
)
def test_batch_boundaries_and_replays_do_not_change_the_result(steps, cuts, replay):
    outcomes = [
        reading(
            T0 + i,
            *(sig(rule, T0 + i, stream=stream) for rule in sorted(rules)),
            stream=stream,
            phase="monitoring" if monitoring else "learning",
        )
        for i, (stream, rules, monitoring) in enumerate(steps)
    ]
    bounds = [0, *sorted(c for c in cuts if c < len(outcomes)), len(outcomes)]
    pieces = [outcomes[a:b] for a, b in itertools.pairwise(bounds) if b > a]
    assert _final_state(pieces, replay) == _final_state([outcomes], replay=False)


def _run_actions(actions: list[tuple], keep_book: bool) -> tuple[list, list]:
    """Carry out ``actions`` on a new file, with one book throughout (it keeps live alerts
    between batches) or a new book for every action (the plain way: read everything each
    time); return the alerts and outbox rows left."""
    with tempfile.TemporaryDirectory() as tmp, Store.open(Path(tmp) / "p.db") as store:
        operator = Store.open(Path(tmp) / "p.db")  # another connection, as the CLI has
        kept = AlertBook(store, POLICY)
        t = T0
        for kind, arg in actions:
            book = kept if keep_book else AlertBook(store, POLICY)
            t += 60.0
            if kind == "batch":
                batch = [
                    reading(t + i, *(sig(r, t + i, stream=sm) for r in rules), stream=sm)
                    for i, (sm, rules) in enumerate(arg)
                ]
                book.apply(batch, now=t + len(batch))
            elif kind == "elsewhere":  # another process writes alerts to the same file
                AlertBook(operator, POLICY).apply([hit(t, stream=arg)], now=t)
            elif kind == "rolled-back":
                with pytest.raises(RuntimeError), store.transaction():
                    book.apply([hit(t, stream=arg)], now=t)
                    raise RuntimeError("the commit failed")
            elif kind == "ack":
                live = [a for a in operator.live_alerts() if a.state == "open"]
                if live:
                    operator.acknowledge(live[arg % len(live)].id, by="op", now=t)
            elif kind == "tick":
                book.tick(t + arg)
        operator.close()
        return store.alerts(), rows(store)


_STREAMS = st.sampled_from(["line-1/a", "line-1/b", "line-2/c"])


@settings(max_examples=examples(60), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    actions=st.lists(
        st.one_of(
            st.tuples(
                st.just("batch"),
                st.lists(
                    st.tuples(_STREAMS, st.sets(st.sampled_from(["beyond-limits", "trend"]))),
                    min_size=1,
                    max_size=6,
                ),
            ),
            st.tuples(st.just("rolled-back"), _STREAMS),
            st.tuples(st.just("elsewhere"), _STREAMS),
            st.tuples(st.just("ack"), st.integers(0, 5)),
            st.tuples(st.just("tick"), st.sampled_from([0.0, 700.0, 2000.0])),
        ),
        max_size=25,
    )
)
def test_a_book_kept_between_batches_ends_where_a_fresh_book_per_batch_ends(actions):
    # Operators acknowledge from their own connection, another writer adds signals, reminders
    # go out on ticks, and some batches roll back: what the long-lived book remembers must
    # never differ from the store.
    assert _run_actions(actions, keep_book=True) == _run_actions(actions, keep_book=False)


# --------------------------------------------------------------------------- policy, routing


def test_severity_comes_from_the_first_matching_rule_or_the_default(fresh_db: Store):
    policy = AlertPolicy(
        default_severity="info",
        severities=(
            SeverityRule("line-2/*", "beyond-limits", "critical"),
            SeverityRule("line-2/*", None, "warning"),
        ),
    )
    book = AlertBook(fresh_db, policy)
    book.apply(
        [
            reading(T0, sig("beyond-limits", T0), sig("trend", T0)),
            hit(T0, "beyond-limits", stream="line-3/gearbox-temp"),
        ],
        now=T0,
    )
    found = {
        (a.stream, rule): tally.severity
        for a in fresh_db.alerts()
        for rule, tally in a.rules.items()
    }
    assert found == {
        (STREAM, "beyond-limits"): "critical",
        (STREAM, "trend"): "warning",
        ("line-3/gearbox-temp", "beyond-limits"): "info",
    }
    # An incident is as severe as its most severe rule.
    assert {a.stream: a.severity for a in fresh_db.alerts()} == {
        STREAM: "critical",
        "line-3/gearbox-temp": "info",
    }


@pytest.mark.parametrize(
    "kwargs",
    [
        {"clear_after": 0},
        {"repeat_every_s": 0.0},
        {"escalate_after_s": -1.0},
        {"default_severity": "urgent"},
        {"severities": (SeverityRule("*", None, "loud"),)},
    ],
)
def test_a_bad_policy_is_refused(kwargs: dict):
    with pytest.raises(ValueError):
        AlertPolicy(**kwargs)


def test_a_router_can_send_one_event_to_several_notifiers(fresh_db: Store):
    def targets(stream: str, rule: str, severity: str, kind: str) -> list[str]:
        return ["pager", "log"] if severity == "critical" else ["log"]

    policy = AlertPolicy(
        severities=(SeverityRule("*", "beyond-limits", "critical"),), targets=targets
    )
    book = AlertBook(fresh_db, policy)
    book.apply([hit(T0, "trend"), hit(T0, "beyond-limits", stream="line-9/x")], now=T0)
    by_route = {
        (n.route, n.payload["stream"]): n.payload["event_id"] for n in fresh_db.notifications()
    }
    assert set(by_route) == {("pager", "line-9/x"), ("log", "line-9/x"), ("log", STREAM)}
    assert by_route["pager", "line-9/x"] == by_route["log", "line-9/x"]


def test_no_matching_route_is_recorded_not_retried(fresh_db: Store):
    book = AlertBook(fresh_db, AlertPolicy(targets=lambda *_: []))
    book.apply([hit(T0)], now=T0)
    (alert,) = fresh_db.alerts()
    (event,) = [e for e in fresh_db.alert_events(alert.id) if e.kind == "notified"]
    assert event.note == "no route matches"
    assert book.tick(T0 + 1).queued == 0 and rows(fresh_db) == []


def test_notifications_expire_after_the_ttl(fresh_db: Store):
    AlertBook(fresh_db, AlertPolicy(notification_ttl_s=3600.0)).apply([hit(T0)], now=T0 + 5)
    (note,) = fresh_db.notifications()
    assert note.expires_at == T0 + 5 + 3600.0


def test_a_signal_without_a_reading_opens_an_alert(book: AlertBook):
    stale = sig("stale", T0 + 900, value=math.nan)
    book.apply_signals([stale], now=T0 + 900)
    (alert,) = book.store.alerts()
    assert (alert.rule, alert.last_value) == ("stale", None)
    payload = book.store.notifications()[0].payload
    assert payload["value"] is None and "No reading has arrived" in payload["text"]
    json.dumps(payload, allow_nan=False)


def _gone_stale(book: AlertBook, now: float, limit: float = 300.0) -> None:
    silence = replace(sig("stale", now, value=79.5), statistic=limit + 60.0, limit=limit)
    book.apply_signals([silence], now=now)


@pytest.mark.parametrize("phase", ["learning", "monitoring"])
def test_a_stale_incident_clears_on_the_first_recent_reading_in_either_phase(book, phase):
    now = T0 + 3600
    _gone_stale(book, now)
    book.apply([reading(now - 20, stream=STREAM, phase=phase)], now=now + 5)
    (alert,) = book.store.alerts()
    assert alert.state == "cleared"
    (event,) = [e for e in book.store.alert_events(alert.id) if e.kind == "cleared"]
    assert "readings arrive again" in (event.note or "")


def test_readings_sent_late_from_before_the_silence_leave_a_stale_alert_open(book: AlertBook):
    # Silence allowed: 300 s. At now + 5 a reading timed 400 s ago is still from the silent
    # spell; the check would find the stream silent again, so the alert stays.
    now = T0 + 3600
    _gone_stale(book, now)
    book.apply([quiet(now - 400 + i) for i in range(POLICY.clear_after + 2)], now=now + 5)
    (alert,) = book.store.alerts()
    assert alert.state == "open"
    book.apply([quiet(now)], now=now + 5)
    assert book.store.alerts()[0].state == "cleared"


def test_stale_joins_a_live_incident_and_a_recent_reading_only_ends_the_silence(book: AlertBook):
    now = T0 + 3600
    book.apply([hit(now - 1000)], now=now - 1000)  # a beyond-limits incident, left live
    _gone_stale(book, now)
    (incident,) = book.store.alerts()
    assert set(incident.rules) == {"beyond-limits", "stale"}
    assert incident.silent_since == now - 360.0
    book.apply([quiet(now)], now=now + 5)
    (incident,) = book.store.alerts()
    assert (incident.state, incident.silent_since, incident.quiet_count) == ("open", None, 1)
    assert kinds(book.store, incident.id)[-1] == "resumed"
    book.apply([quiet(now + 1), quiet(now + 2)], now=now + 5)
    assert book.store.alerts()[0].state == "cleared"


def test_a_stale_text_says_how_long_in_durations_not_seconds(book: AlertBook):
    # silent 2 h 5 min 12 s (7,512 s) where a reading was due within 40 min (2,400 s)
    stale = replace(sig("stale", T0 + 7512, value=86.5), statistic=7512.0, limit=2400.0)
    book.apply_signals([stale], now=T0 + 7512)
    text = book.store.notifications()[0].payload["text"]
    assert "silent for 2h5m12s (expected within 40m)" in text
    assert "Statistic" not in text and "7512" not in text
    # the reading shown is the last one, at its own time, not the time of the check
    assert "Last reading: 86.5 at 2023-11-14T22:13:20Z" in text  # T0 = 2023-11-14T22:13:20Z
    assert "Since: 2023-11-14T22:13:20Z" in text
    assert text.endswith(SAFETY_CAUTION)


def test_a_stale_text_without_any_reading(book: AlertBook):
    stale = replace(sig("stale", T0 + 90, value=math.nan), statistic=90.0, limit=60.0)
    book.apply_signals([stale], now=T0 + 90)
    text = book.store.notifications()[0].payload["text"]
    assert "Last reading: at 1970-01-01T00:00:00Z" not in text
    assert "silent for 1m30s (expected within 1m)" in text and SAFETY_CAUTION in text


def test_every_rule_id_has_words():
    ids = {
        "beyond-limits",
        "two-of-three-zone-a",
        "four-of-five-zone-b",
        "run-one-side",
        "trend",
        "alternating",
        "hugging-center",
        "avoiding-center",
        "mr-beyond-limit",
        "ewma",
        "cusum",
        "stale",
    }
    assert set(RULE_WORDS) == ids
    assert all(words.endswith(".") and len(words) > 30 for words in RULE_WORDS.values())


def test_the_moving_range_text_names_the_moving_range_limit(book: AlertBook):
    book.apply([reading(T0, sig("mr-beyond-limit", T0, value=95.0, chart="mr"))], now=T0)
    text = book.store.notifications()[0].payload["text"]
    assert "Limits: moving range 15, upper limit 11.1." in text  # to a tenth of sigma (3)
    assert "Statistic" not in text and "natural process limits" not in text


def test_an_ewma_text_keeps_its_statistic_for_machines_not_for_people(book: AlertBook):
    ewma = replace(sig("ewma", T0), statistic=0.84, limit=0.79)
    book.apply([reading(T0, ewma)], now=T0)
    payload = book.store.notifications()[0].payload
    assert (payload["statistic"], payload["limit"]) == (0.84, 0.79)
    text = payload["text"]
    assert "0.84" not in text and "statistic" not in text.lower() and "71 to 89" in text
    assert "event" not in text.lower()


# --------------------------------------------------------------------------- pure decisions


def _alert(**fields) -> Alert:
    base = dict(
        id=5,
        stream=STREAM,
        rule="trend",
        state="open",
        severity="warning",
        opened_at=T0,
        first_time=T0,
        first_index=0,
        first_value=1.0,
        last_time=T0,
        last_index=0,
        last_value=1.0,
        signal_count=1,
        quiet_count=0,
        seen_time=T0,
        signal={},
        notified_at=T0,
        last_notice_at=T0,
        announced_severity="warning",
    )
    base.update(fields)
    return Alert(**base)  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("fields", "now", "expected"),
    [
        ({}, T0 + 599, ()),
        ({}, T0 + 600, (Notice("reminder", 1),)),
        (
            {"reminders": 3, "last_notice_at": T0 + 1800, "escalated_at": T0 + 1800},
            T0 + 2400,
            (Notice("reminder", 4),),
        ),
        ({"notified_at": None, "last_notice_at": None}, T0 + 1, (Notice("opened", 0),)),
        ({"last_notice_at": T0 + 1500}, T0 + 1800, (Notice("escalated", 1),)),
        ({}, T0 + 1800, (Notice("reminder", 1), Notice("escalated", 1))),
        ({"escalated_at": T0 + 1800, "last_notice_at": T0 + 1800}, T0 + 2000, ()),
        ({"state": "acknowledged"}, T0 + 9999, (Notice("acknowledged", 0),)),
        ({"state": "acknowledged", "ack_announced_at": T0 + 5}, T0 + 9999, ()),
        ({"state": "acknowledged", "notified_at": None, "last_notice_at": None}, T0 + 9999, ()),
        ({"announced_severity": "info"}, T0 + 1, (Notice("raised", 1),)),
        ({"state": "cleared"}, T0 + 9999, ()),
    ],
)
def test_notices_due(fields: dict, now: float, expected: tuple):
    assert notices_due(_alert(**fields), POLICY, now) == expected


def test_covering_shelf_and_held_until():
    def shelf(id: int, rule: str | None, until: float, ended_at: float | None = None) -> Shelf:
        return Shelf(id, STREAM, rule, T0, until, "r", "x", ended_at)

    shelves = [
        shelf(1, None, T0 + 100),
        shelf(2, "trend", T0 + 500),
        shelf(3, "trend", T0 + 900, ended_at=T0 + 10),
        Shelf(4, "other", None, T0, T0 + 9999, "r", "x"),
    ]
    assert covering_shelf(shelves, STREAM, "trend", T0 + 50).id == 2  # type: ignore[union-attr]
    assert covering_shelf(shelves, STREAM, "beyond-limits", T0 + 50).id == 1  # type: ignore[union-attr]
    assert covering_shelf(shelves, STREAM, "beyond-limits", T0 + 100) is None
    trend = _alert()
    trend.rules = {"trend": None}  # type: ignore[dict-item]
    assert held_until(shelves, trend, T0 + 50) == (T0 + 500, shelves[1])
    both = _alert()
    both.rules = {"trend": None, "beyond-limits": None}  # type: ignore[dict-item]
    assert held_until(shelves, both, T0 + 50) == (T0 + 100, shelves[0])  # the first to end
    assert held_until(shelves, both, T0 + 100) is None  # beyond-limits no longer shelved


def test_signals_for_two_streams_with_the_same_rule_open_two_incidents(fresh_db):
    """Regression: repeats were keyed by rule alone, so a stale check covering several
    streams in one call opened an alert for the first stream only."""
    from limitwatch.alerts.lifecycle import AlertBook
    from limitwatch.model import StreamSignal

    def stale(stream: str) -> StreamSignal:
        return StreamSignal(
            stream=stream,
            rule="stale",
            chart="x",
            side=None,
            index=3,
            time=100.0,
            value=1.0,
            involved=(),
            center=1.0,
            sigma=0.1,
            ucl=1.3,
            lcl=0.7,
            mr=None,
            mr_ucl=0.37,
            baseline_version=1,
        )

    book = AlertBook(fresh_db)
    report = book.apply_signals([stale("pack-1/downtime"), stale("pack-2/downtime")], now=100.0)
    assert report.opened == 2
    assert {a.stream for a in fresh_db.alerts(state="open")} == {
        "pack-1/downtime",
        "pack-2/downtime",
    }


# --------------------------------------------------------------------------- batch invariance


def _everything(store: Store) -> tuple[list, list, list]:
    """Incidents (every field, rules included), each incident's events, every outbox row."""
    incidents = list(reversed(store.alerts()))
    events = [
        [(e.kind, e.time, e.actor, e.note, e.data) for e in store.alert_events(a.id)]
        for a in incidents
    ]
    outbox = [(n.idempotency_key, n.route, n.payload, n.expires_at) for n in store.notifications()]
    return incidents, events, outbox


def _split_run(outcomes: list[Outcome], bounds: list[int], now: float) -> tuple[list, list, list]:
    with tempfile.TemporaryDirectory() as tmp, Store.open(Path(tmp) / "p.db") as store:
        policy = replace(POLICY, severities=(SeverityRule("*", "run-one-side", "critical"),))
        book = AlertBook(store, policy)
        for a, b in itertools.pairwise(bounds):
            if b > a:
                book.apply(outcomes[a:b], now=now)
                live = [x.stream for x in store.live_alerts()]
                assert len(live) == len(set(live))  # one live incident per stream, always
        return _everything(store)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    steps=st.lists(
        st.tuples(
            st.sampled_from(["line-1/a", "line-1/b", "line-2/c"]),
            st.sets(st.sampled_from(["beyond-limits", "trend", "run-one-side"]), max_size=3),
            st.booleans(),  # monitoring (True) or learning
            st.floats(-4.5, 4.5),  # the reading's distance from the center line, in sigmas
        ),
        min_size=1,
        max_size=50,
    ),
    cuts=st.sets(st.integers(1, 49), max_size=10),
)
def test_the_same_readings_in_batches_of_any_size_give_the_same_incidents_events_and_notices(
    steps, cuts
):
    # One "now" for every batch: the split is the only difference between the two runs.
    outcomes = []
    for i, (stream, rules, monitoring, z) in enumerate(steps):
        o = reading(
            T0 + i,
            *(sig(rule, T0 + i, stream=stream) for rule in sorted(rules)),
            stream=stream,
            phase="monitoring" if monitoring else "learning",
        )
        o.z = z
        outcomes.append(o)
    now = T0 + 10_000
    bounds = [0, *sorted(c for c in cuts if c < len(outcomes)), len(outcomes)]
    one_by_one = list(range(len(outcomes) + 1))
    whole = _split_run(outcomes, [0, len(outcomes)], now)
    assert _split_run(outcomes, bounds, now) == whole
    assert _split_run(outcomes, one_by_one, now) == whole


def test_decide_leaves_its_inputs_alone_and_writes_only_what_changed(fresh_db: Store):
    book = AlertBook(fresh_db, POLICY)
    book.apply([hit(T0), hit(T0, stream="line-9/x")], now=T0)
    live = {a.stream: a for a in fresh_db.live_alerts()}
    before = {s: a.copy() for s, a in live.items()}
    decision = decide(
        live, [quiet(T0 + 1)], policy=POLICY, now=T0 + 1, next_id=fresh_db.next_alert_id()
    )
    assert live == before  # nothing it was given changed
    (changed,) = decision.changes.changed  # the quiet stream's incident only
    assert (changed.stream, changed.quiet_count) == (STREAM, 1)
    assert decision.changes.rules == [] and decision.changes.outbox == []
    assert decision.live == {STREAM: changed}


_KILLED_BETWEEN_DECISION_AND_COMMIT = """
import os, signal, sys
from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy
from limitwatch.store import Store
from tests.test_lifecycle import hit, quiet, T0

store = Store.open(sys.argv[1])
book = AlertBook(store, AlertPolicy(clear_after=3))
written = Store.write_changes

def write_then_die(self, changes):
    written(self, changes)  # every row of the decision is written, but not committed
    os.kill(os.getpid(), signal.SIGKILL)

Store.write_changes = write_then_die
with store.transaction():
    store.add_readings([hit(T0), quiet(T0 + 1)], now=T0 + 1)
    book.apply([hit(T0), quiet(T0 + 1)], now=T0 + 1)
"""


def test_a_kill_9_between_decision_and_commit_loses_and_doubles_no_notification(tmp_path):
    import subprocess
    import sys

    db = tmp_path / "killed.db"
    Store.open(db).close()
    died = subprocess.run(
        [sys.executable, "-c", _KILLED_BETWEEN_DECISION_AND_COMMIT, str(db)],
        cwd=Path(__file__).parent.parent,
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert died.returncode == -9, died.stderr  # killed, as kill -9 would
    with Store.open(db) as store:
        assert store.alerts() == [] and rows(store) == []  # nothing half-written survives
        # The source redelivers what was never acknowledged; the same decision is made again.
        book = AlertBook(store, AlertPolicy(clear_after=3))
        for _ in range(2):  # and a second redelivery changes nothing
            with store.transaction():
                store.add_readings([hit(T0), quiet(T0 + 1)], now=T0 + 2)
                book.apply([hit(T0), quiet(T0 + 1)], now=T0 + 2)
        (incident,) = store.alerts()
        assert rows(store) == [(f"{incident.id}:opened:0:default", "default")]
        assert kinds(store, incident.id) == ["opened", "notified"]


def test_every_kind_of_body_follows_the_published_schema(fresh_db: Store):
    import jsonschema

    schema_path = Path(__file__).parent.parent / "docs" / "notification.schema.json"
    schema = json.loads(schema_path.read_text(encoding="utf-8"))
    policy = replace(POLICY, severities=(SeverityRule("*", "trend", "critical"),))
    book = AlertBook(fresh_db, policy)
    book.apply([hit(T0)], now=T0)  # opened
    book.tick(T0 + 600)  # reminder
    book.apply([hit(T0 + 700, "trend")], now=T0 + 700)  # raised
    book.tick(T0 + 1800)  # escalated
    (incident,) = fresh_db.alerts()
    fresh_db.acknowledge(incident.id, by="m.chen", note="swapping the probe", now=T0 + 1900)
    book.tick(T0 + 1901)  # acknowledged
    book.apply([quiet(T0 + 2000 + i) for i in range(3)], now=T0 + 2100)  # cleared
    _gone_stale(book, T0 + 9000)  # opened, for a stream that went silent
    bodies = [n.payload for n in fresh_db.notifications()]
    assert {b["kind"] for b in bodies} == {
        "opened",
        "reminder",
        "raised",
        "escalated",
        "acknowledged",
        "cleared",
    }
    for body in bodies:
        jsonschema.validate(body, schema, format_checker=jsonschema.FormatChecker())
        json.dumps(body, allow_nan=False)
    # The schema is not a formality: a body without its unit, or with a made-up kind, fails.
    broken = {k: v for k, v in bodies[0].items() if k != "unit"}
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(broken, schema)
    incident_only = {"$defs": schema["$defs"], "$ref": "#/$defs/incident"}
    with pytest.raises(jsonschema.ValidationError, match="'unit' is a required property"):
        jsonschema.validate(broken, incident_only)
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate({**bodies[0], "kind": "exploded"}, schema)


# --------------------------------------------------------------------------- floods


def _crossing(n: int, t: float) -> list[Outcome]:
    """``n`` streams crossing a limit together, as one cause upstream would do it."""
    return [hit(t + i * 0.01, stream=f"hall-b/pump-{i:03d}") for i in range(n)]


def test_many_streams_at_once_become_one_flood_notice_per_route(fresh_db: Store):
    policy = replace(POLICY, flood_after=10, flood_window_s=600.0)
    book = AlertBook(fresh_db, policy)
    report = book.apply(_crossing(300, T0), now=T0)
    assert report.opened == 300 and report.flood_started == 1
    kinds_queued = [k.split(":")[1] for k, _ in rows(fresh_db)]
    # The first ten are told one by one; the eleventh starts the flood, which tells the rest.
    assert kinds_queued == ["opened"] * 10 + ["flood"]
    flood_notice = fresh_db.notifications()[-1].payload
    assert flood_notice["changes"] == 11 and len(flood_notice["streams"]) == 11
    assert "hall-b/pump-010" in flood_notice["text"] and SAFETY_CAUTION in flood_notice["text"]
    (flood,) = fresh_db.floods()
    assert (flood.changes, len(flood.streams), flood.ended_at) == (300, 300, None)
    folded = fresh_db.alerts(stream_glob="hall-b/pump-299")[0]
    assert "folded into flood 1" in (fresh_db.alert_events(folded.id)[-1].note or "")
    # More in a later batch while it lasts: still no message each, and no second flood notice.
    book.apply(_crossing(20, T0 + 60), now=T0 + 60)  # readings clear nothing: all still live
    assert len(rows(fresh_db)) == 11
    # The surge passes: the flood ends, logged in its row, and notices go one by one again.
    report = book.tick(T0 + 60 + 601)
    assert report.flood_ended == 1
    assert fresh_db.floods()[0].ended_at == T0 + 661
    book.apply([hit(T0 + 700, stream="hall-c/fan-1")], now=T0 + 700)
    assert rows(fresh_db)[-1][0].split(":")[1] == "opened"


def test_a_flood_notice_follows_its_published_schema(fresh_db: Store):
    import jsonschema

    schema = json.loads(
        (Path(__file__).parent.parent / "docs" / "notification.schema.json").read_text("utf-8")
    )
    book = AlertBook(fresh_db, replace(POLICY, flood_after=2))
    book.apply(_crossing(5, T0), now=T0)
    flood_notice = fresh_db.notifications()[-1].payload
    assert flood_notice["kind"] == "flood"
    jsonschema.validate(flood_notice, schema, format_checker=jsonschema.FormatChecker())


def test_flood_handling_can_be_turned_off(fresh_db: Store):
    book = AlertBook(fresh_db, replace(POLICY, flood_after=None))
    book.apply(_crossing(30, T0), now=T0)
    assert [k.split(":")[1] for k, _ in rows(fresh_db)] == ["opened"] * 30
    assert fresh_db.floods() == []


def test_receivers_that_heard_of_an_incident_hear_when_a_shelf_holds_it_and_when_it_ends(
    fresh_db: Store,
):
    import jsonschema

    schema = json.loads(
        (Path(__file__).parent.parent / "docs" / "notification.schema.json").read_text("utf-8")
    )
    book = AlertBook(fresh_db, POLICY)
    book.apply([hit(T0)], now=T0)
    (incident,) = fresh_db.alerts()
    fresh_db.shelve(STREAM, until=T0 + 3600, reason="bearing swap", by="r.diaz", now=T0 + 10)
    assert book.tick(T0 + 11).queued == 1
    assert book.tick(T0 + 12).queued == 0  # told once
    shelved = fresh_db.notifications()[-1].payload
    assert shelved["event_id"] == f"{incident.id}:shelved:1"
    assert shelved["shelf"]["by"] == "r.diaz" and "bearing swap" in shelved["text"]
    # While shelved, the reminder is held; when the shelf ends early, receivers hear it.
    assert book.tick(T0 + 700).queued == 0
    fresh_db.unshelve(STREAM, by="r.diaz", now=T0 + 800)
    book.tick(T0 + 801)
    tail = [n.payload["kind"] for n in fresh_db.notifications()][-2:]
    assert tail == ["unshelved", "reminder"]
    for note in fresh_db.notifications():
        jsonschema.validate(note.payload, schema, format_checker=jsonschema.FormatChecker())
    # An incident nobody was told of is not announced as shelved (its opened notice is held).
    fresh_db.shelve("line-9/x", until=T0 + 3600, reason="stop", by="x", now=T0 + 900)
    book.apply([hit(T0 + 901, stream="line-9/x")], now=T0 + 901)
    assert all(n.payload["stream"] != "line-9/x" for n in fresh_db.notifications())
