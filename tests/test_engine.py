"""StreamMonitor: learning, refusals, gaps, and checkpoints that change nothing."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.model import Reading
from limitwatch.stats.baseline import fit_baseline
from limitwatch.stats.constants import D2
from tests.helpers import examples


def feed(monitor: StreamMonitor, values, start: float = 0.0, step: float = 60.0):
    return [
        monitor.update(Reading(monitor.stream, start + i * step, float(v)))
        for i, v in enumerate(values)
    ]


def quiet(n: int, seed: int = 1) -> list[float]:
    return list(np.round(np.random.default_rng(seed).normal(50.0, 2.0, n), 3))


def test_learning_fits_the_same_baseline_as_a_batch_fit():
    values = quiet(25)
    monitor = StreamMonitor("s", MonitorSettings(learn_count=25))
    outcomes = feed(monitor, values)
    assert [o.baseline_fitted for o in outcomes].count(True) == 1
    assert outcomes[-1].baseline_fitted and monitor.phase == "monitoring"
    batch = fit_baseline(values)
    assert monitor.baseline is not None
    assert monitor.baseline.center == pytest.approx(float(np.mean(values)))
    assert monitor.baseline.sigma == pytest.approx(batch.sigma)
    # sigma = average moving range / d2, computed plainly here
    assert monitor.baseline.sigma == pytest.approx(np.mean(np.abs(np.diff(values))) / D2)
    assert all(not o.signals for o in outcomes), "learning readings are not judged"


def test_a_wild_reading_after_learning_signals_on_both_charts():
    monitor = StreamMonitor("s", MonitorSettings(learn_count=25, rules="limits"))
    feed(monitor, quiet(25))
    b = monitor.baseline
    assert b is not None
    outcome = monitor.update(Reading("s", 25 * 60.0, b.center + 4 * b.sigma))
    rules = {s.rule: s for s in outcome.signals}
    assert set(rules) == {"beyond-limits", "mr-beyond-limit"}
    x = rules["beyond-limits"]
    assert (x.chart, x.side, x.index, x.involved) == ("x", "upper", 25, (25,))
    assert x.ucl == pytest.approx(b.center + 3 * b.sigma)
    mr = rules["mr-beyond-limit"]
    assert mr.chart == "mr" and mr.statistic == pytest.approx(outcome.mr)
    assert mr.limit == pytest.approx(b.mr_ucl)


@pytest.mark.parametrize(
    ("reading", "reason"),
    [
        (Reading("s", 23 * 60.0, 0.0), "out-of-order"),  # same time as the last, new value
        (Reading("s", 10.0, 50.0), "out-of-order"),
        (Reading("s", 30 * 60.0, math.nan), "not-finite"),
        (Reading("s", 30 * 60.0, math.inf), "not-finite"),
        (Reading("s", 30 * 60.0, -1.0), "below-lower-bound"),
        (Reading("s", 30 * 60.0, 1e9), "above-upper-bound"),
    ],
)
def test_refused_readings_change_nothing(reading, reason):
    monitor = StreamMonitor("s", MonitorSettings(learn_count=20, lower_bound=0, upper_bound=1e6))
    feed(monitor, quiet(24))
    before = json.dumps(monitor.state(), sort_keys=True)
    outcome = monitor.update(reading)
    assert not outcome.accepted and outcome.reason == reason
    assert json.dumps(monitor.state(), sort_keys=True) == before


def test_redelivered_reading_is_a_duplicate_by_time_and_value_or_by_sequence():
    monitor = StreamMonitor("s", MonitorSettings(learn_count=20))
    first = monitor.update(Reading("s", 100.0, 5.0, seq=7))
    assert first.accepted and first.index == 0
    assert monitor.update(Reading("s", 100.0, 5.0, seq=7)).reason == "duplicate"
    assert monitor.update(Reading("s", 200.0, 6.0, seq=6)).reason == "duplicate"
    later = monitor.update(Reading("s", 200.0, 6.0, seq=8))
    assert later.accepted and later.index == 1
    plain = StreamMonitor("p", MonitorSettings(learn_count=20))
    plain.update(Reading("p", 1.0, 3.0))
    assert plain.update(Reading("p", 1.0, 3.0)).reason == "duplicate"


def test_moving_range_across_a_long_gap_is_skipped():
    monitor = StreamMonitor("s", MonitorSettings(learn_count=20, rules="limits", max_gap=120.0))
    feed(monitor, quiet(20))
    b = monitor.baseline
    assert b is not None
    # a step of 2.5 sigma after a 1-hour stop: inside the X limits, and its moving range
    # (about 2.5 sigma plus noise) would be compared with the MR limit if it were kept
    jump = b.center + 2.9 * b.sigma
    after_gap = monitor.update(Reading("s", 19 * 60.0 + 3600.0, jump))
    assert after_gap.accepted and after_gap.mr is None and not after_gap.signals
    nxt = monitor.update(Reading("s", 19 * 60.0 + 3660.0, b.center - 2.9 * b.sigma))
    assert nxt.mr == pytest.approx(5.8 * b.sigma)
    assert [s.rule for s in nxt.signals] == ["mr-beyond-limit"]


def test_stuck_sensor_keeps_learning_with_bounded_memory():
    monitor = StreamMonitor("s", MonitorSettings(learn_count=12, min_points=10))
    feed(monitor, [4.0] * 200)
    assert monitor.phase == "learning"
    assert monitor.last_fit_error is not None and "moving range" in monitor.last_fit_error.lower()
    assert len(monitor.state()["learning"]) < 12
    outcomes = feed(monitor, quiet(12), start=200 * 60.0)
    assert any(o.baseline_fitted for o in outcomes)


def test_starting_from_a_stored_baseline_monitors_from_the_first_reading():
    b = fit_baseline(quiet(30, seed=3))
    monitor = StreamMonitor("s", MonitorSettings(rules="limits"), baseline=b, baseline_version=4)
    outcome = monitor.update(Reading("s", 0.0, b.center + 3.5 * b.sigma))
    assert outcome.phase == "monitoring"
    assert [s.rule for s in outcome.signals] == ["beyond-limits"]
    assert outcome.signals[0].baseline_version == 4


def test_new_baseline_restarts_run_counts():
    b = fit_baseline(quiet(30, seed=4))
    monitor = StreamMonitor("s", MonitorSettings(rules="run-one-side"), baseline=b)
    for i in range(7):
        assert not monitor.update(Reading("s", float(i), b.center + 0.5 * b.sigma)).signals
    monitor.set_baseline(b)
    assert monitor.baseline_version == 2
    assert not monitor.update(Reading("s", 7.0, b.center + 0.5 * b.sigma)).signals


values_strategy = st.lists(
    st.one_of(
        st.floats(min_value=-4, max_value=4, allow_nan=False).map(lambda v: round(v, 1)),
        st.sampled_from([-3.0, -2.0, -1.0, 0.0, 1.0, 2.0, 3.0]),
    ),
    min_size=1,
    max_size=120,
)


@settings(max_examples=examples(60), deadline=None)
@given(values=values_strategy, cut=st.integers(min_value=0, max_value=120), seed=st.integers(0, 9))
def test_state_round_trip_mid_stream_changes_nothing(values, cut, seed):
    """Property: a checkpoint at any point, written to JSON and read back, continues exactly as
    the uninterrupted monitor does -- the guarantee a crash-and-restart relies on."""
    learn = [*quiet(20, seed=seed)]
    stream = learn + [50.0 + 2.0 * v for v in values]
    cut = min(cut + 5, len(stream))
    config = MonitorSettings(learn_count=20, rules="nelson,ewma,cusum", max_gap=90.0)
    times = [i * 60.0 + (3600.0 if i % 17 == 16 else 0.0) for i in range(len(stream))]
    whole = StreamMonitor("s", config)
    expected = [whole.update(Reading("s", t, v)) for t, v in zip(times, stream, strict=True)]
    first = StreamMonitor("s", config)
    got = [first.update(Reading("s", t, v)) for t, v in zip(times[:cut], stream[:cut], strict=True)]
    saved = json.loads(json.dumps(first.state()))
    second = StreamMonitor.from_state(saved, config)
    older = StreamMonitor.from_state(json.loads(json.dumps(as_format_1(saved, config))), config)
    assert older.state() == second.state()
    rest = list(zip(times[cut:], stream[cut:], strict=True))
    got += [second.update(Reading("s", t, v)) for t, v in rest]
    assert [o.signals for o in got] == [o.signals for o in expected]
    assert second.state() == whole.state()
    older_got = [older.update(Reading("s", t, v)) for t, v in rest]
    assert [o.signals for o in older_got] == [o.signals for o in expected[cut:]]


def as_format_1(state: dict, config: MonitorSettings) -> dict:
    """The same checkpoint as format 1 wrote it: each detector's full ``state()`` (rule,
    parameters, named values) under ``detectors`` instead of ``rules`` and ``states``."""
    x, mr = config.build_detectors()
    detectors = []
    for detector, values in zip((*x, *mr), state["states"], strict=False):
        full = detector.state()
        detectors.append({**full, "state": dict(zip(full["state"], values, strict=True))})
    old = {k: v for k, v in state.items() if k not in ("rules", "states")}
    return {**old, "format": 1, "detectors": detectors}


def test_restore_with_changed_rules_starts_detectors_fresh():
    config = MonitorSettings(learn_count=20, rules="run-one-side")
    monitor = StreamMonitor("s", config)
    feed(monitor, quiet(20))
    b = monitor.baseline
    assert b is not None
    for i in range(7):
        monitor.update(Reading("s", 2000.0 + i, b.center + 0.3 * b.sigma))
    same = StreamMonitor.from_state(monitor.state(), config)
    assert same.update(Reading("s", 3000.0, b.center + 0.3 * b.sigma)).signals
    other = StreamMonitor.from_state(
        monitor.state(), MonitorSettings(learn_count=20, rules="run-one-side(length=9)")
    )
    assert not other.update(Reading("s", 3000.0, b.center + 0.3 * b.sigma)).signals


def test_settings_refuse_a_learning_window_below_the_floor():
    with pytest.raises(ValueError, match="learn_count"):
        MonitorSettings(learn_count=5, min_points=10)


DATA = Path(__file__).parent / "data"
CHECKPOINT_BEFORE_FUSED = DATA / "checkpoint-format-2-separate-detectors.json"


def test_a_checkpoint_written_by_the_separate_detectors_restores_to_the_same_state():
    """The file was written by the engine before it ran every test in one fused call; restoring
    it must give back exactly that state, and continue as an uninterrupted monitor does."""
    doc = json.loads(CHECKPOINT_BEFORE_FUSED.read_text())
    saved, values = doc["checkpoint"], doc["readings"]
    config = MonitorSettings(learn_count=20, rules="nelson,ewma,cusum")
    restored = StreamMonitor.from_state(json.loads(json.dumps(saved)), config)
    assert restored.state() == saved
    assert any(state and state[0] for state in saved["states"]), "live run-test state"
    whole = StreamMonitor(saved["stream"], config)
    feed(whole, values)
    assert whole.state() == saved
    later = [50.0 + 3.5 * (-1) ** i for i in range(40)]
    start = len(values) * 60.0
    got, expected = feed(restored, later, start=start), feed(whole, later, start=start)
    assert [o.signals for o in got] == [o.signals for o in expected]
    assert any(o.signals for o in got)


CHECKPOINT_FORMAT_1 = DATA / "checkpoint-format-1.json"


@pytest.mark.parametrize("path", [CHECKPOINT_FORMAT_1, CHECKPOINT_BEFORE_FUSED], ids=["1", "2"])
def test_an_old_checkpoint_continues_as_a_monitor_that_never_stopped(path):
    """Each file was written by an earlier version from the same readings: format 1 (every
    detector's full state, parameters included, under ``detectors``) and format 2 by the
    separate detectors. Each restores to the state this version reaches from those readings,
    and the monitor then gives the same signals as one that never stopped."""
    doc = json.loads(path.read_text())
    saved, values = doc["checkpoint"], doc["readings"]
    config = MonitorSettings(learn_count=20, rules="nelson,ewma,cusum")
    whole = StreamMonitor(saved["stream"], config)
    feed(whole, values)
    restored = StreamMonitor.from_state(json.loads(json.dumps(saved)), config)
    assert restored.state() == whole.state()
    live = [s for s in whole.state()["states"] if s and (s[0] or s[1])]
    assert len(live) >= 3, "the checkpoint carries live run-test, EWMA and CUSUM state"
    later = [50.0 + 3.5 * (-1) ** i for i in range(40)] + [52.5 + 0.1 * i for i in range(10)]
    start = len(values) * 60.0
    got, expected = feed(restored, later, start=start), feed(whole, later, start=start)
    assert [o.signals for o in got] == [o.signals for o in expected]
    assert len({s.rule for o in got for s in o.signals}) >= 2
    assert restored.state() == whole.state()


def test_a_format_1_checkpoint_under_other_parameters_restarts_its_detectors():
    doc = json.loads(CHECKPOINT_FORMAT_1.read_text())
    saved = doc["checkpoint"]
    config = MonitorSettings(learn_count=20, rules="nelson,ewma,cusum(h=4)")
    restored = StreamMonitor.from_state(saved, config)
    fresh = StreamMonitor(saved["stream"], config, baseline=restored.baseline)
    assert restored.state()["states"] == fresh.state()["states"]
    assert restored.count == saved["count"]
