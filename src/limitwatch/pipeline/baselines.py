"""Baseline bookkeeping: which version is in force for a new monitor, and recording the ones
the store has not numbered (typed in, learned, in force at a restart); adopting the ones an
operator stored. The store is the only numberer of baseline versions."""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterable

from limitwatch.engine import StreamMonitor
from limitwatch.model import Outcome
from limitwatch.stats.baseline import Baseline, BaselineError
from limitwatch.store import CONFIG_AUTHOR, Store, same_numbers

log = logging.getLogger("limitwatch.pipeline")

TypedBaseline = Callable[[str], Baseline | None]


def baseline_in_force(
    store: Store, typed_baseline: TypedBaseline, stream: str, now: float
) -> tuple[Baseline, int] | None:
    """The baseline a new monitor of ``stream`` starts from, with its store version.

    The store is the only numberer of baseline versions. A baseline typed into the config
    is recorded as a version the first time it is used, and again whenever the config's
    numbers change; otherwise the newest stored version (an operator's refit included)
    is in force. So a refit always gets a number above the one the monitor holds, and
    the refits job adopts it.
    """
    typed = typed_baseline(stream)
    if typed is not None:
        numbers = typed.to_dict()
        recorded = store.latest_baseline_by(stream, CONFIG_AUTHOR)
        if recorded is None or not same_numbers(recorded.numbers, numbers):
            stored = store.add_baseline(
                stream,
                numbers,
                now=now,
                by=CONFIG_AUTHOR,
                reason="typed into the config",
                method=typed.method,
            )
            log.info("stream %s: the config's baseline is version %d", stream, stored.version)
            return typed, stored.version
    current = store.current_baseline(stream)
    if current is None:
        return None
    return Baseline.from_dict(current.numbers), current.version


def record_unnumbered(
    store: Store, monitors: Iterable[StreamMonitor], typed_baseline: TypedBaseline
) -> None:
    """Record the baselines in force that the store has never numbered.

    Databases written before the store numbered every version hold monitors whose typed-in
    baseline (version 1) has no row, so an operator's refit was numbered 1 too and never
    adopted. Recording the monitor's version makes the next refit come out above it.
    """
    versions = store.baseline_versions()
    missing = [
        m
        for m in monitors
        if m.baseline is not None and versions.get(m.stream, 0) < m.baseline_version
    ]
    if not missing:
        return
    with store.transaction():
        for m in missing:
            assert m.baseline is not None
            typed = typed_baseline(m.stream) is not None
            store.add_baseline(
                m.stream,
                m.baseline.to_dict(),
                now=0.0 if m.last_time is None else m.last_time,
                by=CONFIG_AUTHOR if typed else "limitwatch",
                reason="in force at a restart but never recorded",
                method=m.baseline.method,
                version=m.baseline_version,
            )
    log.info("recorded %d baselines in force that the store had not numbered", len(missing))


def _time_at(store: Store, stream: str, index: int, last_time: float) -> float | None:
    """The time of the stream's reading at ``index`` (stored in this transaction already,
    with the batch's readings), for the first reading of a learned baseline."""
    row = store.db.conn.execute(
        "SELECT time FROM readings WHERE stream = ? AND idx = ? AND time <= ?",
        (stream, index, last_time),
    ).fetchone()
    return None if row is None else float(row[0])


def record_learned(store: Store, monitor: StreamMonitor, outcome: Outcome, now: float) -> None:
    baseline = monitor.baseline
    assert baseline is not None and outcome.index is not None
    current = store.current_baseline(monitor.stream)
    if current is not None and current.version >= monitor.baseline_version:
        # An operator refitted the stream while it was still learning, before the refits
        # job adopted it: the operator's explicit choice wins over the automatic fit, which
        # is not recorded (its number is taken).
        monitor.set_baseline(Baseline.from_dict(current.numbers), version=current.version)
        log.warning(
            "stream %s: finished learning after an operator stored baseline version %d; "
            "that version is in force and the learned fit is dropped",
            monitor.stream,
            current.version,
        )
        return
    first = outcome.index - baseline.n + 1
    store.add_baseline(
        monitor.stream,
        baseline.to_dict(),
        now=now,
        by="limitwatch",
        reason=f"learned from the stream's readings {first}..{outcome.index}",
        method=baseline.method,
        version=monitor.baseline_version,
        first_index=first,
        last_index=outcome.index,
        first_time=_time_at(store, monitor.stream, first, outcome.reading.time),
        last_time=outcome.reading.time,
        excluded=[first + p for p in baseline.excluded],
    )


def adopt_stored_baselines(store: Store, monitors: dict[str, StreamMonitor]) -> list[str]:
    """Apply baselines stored by someone else (``limitwatch baseline refit``): newer
    versions replace the monitor's, and its run counts restart; return the streams changed,
    whose checkpoints the caller writes at once."""
    changed = []
    for stream, version in store.baseline_versions().items():
        monitor = monitors.get(stream)
        if monitor is None or version <= monitor.baseline_version:
            continue
        stored = store.current_baseline(stream)
        if stored is None:
            continue
        try:
            monitor.set_baseline(Baseline.from_dict(stored.numbers), version=stored.version)
        except BaselineError as exc:
            log.error("stream %s: stored baseline %d refused: %s", stream, stored.version, exc)
            continue
        changed.append(stream)
    return changed
