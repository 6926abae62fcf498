"""The store numbers every baseline version, so an operator's refit is always adopted.

Regression tests for two defects of the time when the engine numbered its own baselines:
a typed-in baseline never adopted a refit (both were version 1), and a refit made while a stream
was still learning made the batch that completed learning fail with a version conflict.
"""

from __future__ import annotations

import gc
from pathlib import Path

import numpy as np

from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy
from limitwatch.engine import MonitorSettings
from limitwatch.model import Reading
from limitwatch.pipeline import Parsed, Pipeline
from limitwatch.stats.baseline import Baseline
from limitwatch.store import CONFIG_AUTHOR, Store

STREAM = "press-4/force"
LEARN = 12


def _values(n: int, seed: int = 7) -> list[float]:
    return [round(float(v), 3) for v in np.random.default_rng(seed).normal(50.0, 1.0, n)]


def _feed(pipe: Pipeline, values: list[float], start: int) -> None:
    for i, v in enumerate(values):
        t = 1000.0 + (start + i) * 60.0
        pipe.process([Parsed("test", str(v).encode(), Reading(STREAM, t, v))], now=t + 1)


def _pipeline(store: Store, typed: Baseline | None = None) -> Pipeline:
    settings = MonitorSettings(learn_count=LEARN, min_points=10, rules="limits")
    book = AlertBook(store, AlertPolicy(clear_after=5))
    return Pipeline(store, lambda s: settings, book, lambda s: typed)


def _operator_refit(store: Store, center: float) -> int:
    """What ``limitwatch baseline refit`` stores: the next number, chosen by the store."""
    fitted = Baseline.from_limits(center=center, sigma=2.0, method="mean")
    return store.add_baseline(
        STREAM, fitted.to_dict(), now=5000.0, by="ana", reason="new tooling", method="mean"
    ).version


def test_a_typed_baseline_is_recorded_once_and_a_refit_is_adopted(tmp_path: Path) -> None:
    typed = Baseline.from_limits(center=50.0, sigma=1.0, method="mean")
    with Store.open(tmp_path / "lw.db", now=0.0) as store:
        pipe = _pipeline(store, typed)
        _feed(pipe, _values(5), 0)
        history = store.baseline_history(STREAM)
        assert [(b.version, b.created_by) for b in history] == [(1, CONFIG_AUTHOR)]
        assert pipe.monitors[STREAM].baseline_version == 1

        version = _operator_refit(store, center=53.0)
        assert version == 2  # before the fix the store numbered it 1 and the pipeline skipped it
        assert pipe.adopt_new_baselines(6000.0) == [STREAM]
        monitor = pipe.monitors[STREAM]
        assert monitor.baseline_version == 2
        assert monitor.baseline is not None and monitor.baseline.center == 53.0


def test_a_new_monitor_takes_the_refit_over_an_unchanged_typed_baseline(tmp_path: Path) -> None:
    typed = Baseline.from_limits(center=50.0, sigma=1.0, method="mean")
    path = tmp_path / "lw.db"
    with Store.open(path, now=0.0) as store:
        _feed(_pipeline(store, typed), _values(3), 0)
        _operator_refit(store, center=53.0)
    with Store.open(path, now=0.0) as store:  # a new monitor, no checkpoint read
        pipe = _pipeline(store, typed)
        found = pipe.baseline_in_force(STREAM, now=7000.0)
        assert found is not None and found[1] == 2 and found[0].center == 53.0
        assert len(store.baseline_history(STREAM)) == 2  # nothing recorded again


def test_a_changed_typed_baseline_becomes_a_new_version(tmp_path: Path) -> None:
    path = tmp_path / "lw.db"
    with Store.open(path, now=0.0) as store:
        pipe = _pipeline(store, Baseline.from_limits(center=50.0, sigma=1.0, method="mean"))
        pipe.baseline_in_force(STREAM, now=1.0)
        pipe = _pipeline(store, Baseline.from_limits(center=51.0, sigma=1.0, method="mean"))
        found = pipe.baseline_in_force(STREAM, now=2.0)
        assert found is not None and found[1] == 2 and found[0].center == 51.0


def test_a_refit_while_learning_does_not_break_the_batch_that_ends_learning(
    tmp_path: Path,
) -> None:
    with Store.open(tmp_path / "lw.db", now=0.0) as store:
        pipe = _pipeline(store)
        values = _values(LEARN + 5)
        _feed(pipe, values[: LEARN - 1], 0)
        assert pipe.monitors[STREAM].phase == "learning"
        assert _operator_refit(store, center=60.0) == 1
        _feed(pipe, values[LEARN - 1 :], LEARN - 1)  # raised a version conflict before the fix
        assert not pipe.broken
        monitor = pipe.monitors[STREAM]
        assert monitor.baseline_version == 1
        assert monitor.baseline is not None and monitor.baseline.center == 60.0
        assert [b.created_by for b in store.baseline_history(STREAM)] == ["ana"]
        assert len(store.recent_readings(STREAM, last=100)) == LEARN + 5


def test_a_legacy_typed_monitor_is_numbered_at_restore(tmp_path: Path) -> None:
    """A database from before: the monitor holds the typed baseline as version 1, no row."""
    path = tmp_path / "lw.db"
    typed = Baseline.from_limits(center=50.0, sigma=1.0, method="mean")
    with Store.open(path, now=0.0) as store:
        pipe = _pipeline(store, typed)
        _feed(pipe, _values(4), 0)
        pipe.checkpoint_all(9000.0)
        store.db.execute("DROP TRIGGER IF EXISTS baselines_no_delete")
        store.db.execute("DELETE FROM baselines")
    with Store.open(path, now=0.0) as store:
        pipe = _pipeline(store, typed)
        assert pipe.restore() == 1
        assert [b.version for b in store.baseline_history(STREAM)] == [1]
        assert _operator_refit(store, center=55.0) == 2
        assert pipe.adopt_new_baselines(9500.0) == [STREAM]


def test_the_restore_checks_numbering_with_the_collector_paused_and_resumes_it(
    tmp_path: Path,
) -> None:
    """The check's query returns a row per stream; made while the collector runs, those rows
    set off a full collection over every restored monitor. The collector is back on after."""
    path = tmp_path / "lw.db"
    typed = Baseline.from_limits(center=50.0, sigma=1.0, method="mean")
    with Store.open(path, now=0.0) as store:
        pipe = _pipeline(store, typed)
        _feed(pipe, _values(4), 0)
        pipe.checkpoint_all(9000.0)
    seen: list[bool] = []
    with Store.open(path, now=0.0) as store:
        versions = store.baseline_versions

        def watched() -> dict[str, int]:
            seen.append(gc.isenabled())
            return versions()

        store.baseline_versions = watched  # type: ignore[method-assign]
        assert gc.isenabled()
        assert _pipeline(store, typed).restore() == 1
        assert seen == [False]
        assert gc.isenabled()
        assert versions() == {STREAM: 1}
