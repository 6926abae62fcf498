"""Each stored reading names the baseline version that judged it, and the charts draw each
reading's limits from that stored version.

Readings go through the real Pipeline (StreamMonitor + AlertBook) into a real SQLite file; the
operator's refit goes through the real ``limitwatch baseline refit`` command and is adopted as
the service's refits job adopts it. The plant ("Quillmoor Works") and its readings are invented
(seeded random numbers).

External references used below:

* XmR factors for moving ranges of two readings: natural process limits = mean +- 2.66 MRbar,
  upper moving-range limit = 3.27 MRbar (rounded to three figures). ASTM E2587, *Standard
  Practice for Use of Control Charts in Statistical Process Control*, table of control chart
  factors (E2 = 2.660, D4 = 3.268 for n = 2); Wheeler, D. J., *Understanding Statistical
  Process Control* (2.66 and 3.268). Both from memory; the rounded factors differ from the exact
  3/d2 = 2.6587 and D4 = 3.2665 by under 0.002, which the tolerances below allow and no more.
"""

from __future__ import annotations

import sqlite3
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import sqlite_utils
from hypothesis import given, settings
from hypothesis import strategies as st

from limitwatch import SAFETY_CAUTION
from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy
from limitwatch.charts import limits_per_point
from limitwatch.charts.gather import fallback_note, gather, limits_in_force
from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.model import Outcome, Reading
from limitwatch.pipeline import Parsed, Pipeline
from limitwatch.stats.baseline import Baseline, limits_of
from limitwatch.store import CONFIG_AUTHOR, MIGRATIONS, Store, StoredReading, migrate
from limitwatch.store import Baseline as StoredBaseline
from tests.helpers import CliResult, cli, examples

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z
STEP = 600.0
LEARN = 25
KILN = "kiln-2/zone-temp"
DRYER = "dryer-3/moisture"
REFIT_LAST = 20
BEFORE_REFIT = 65  # kiln readings stored before the refit: 25 learning, 20 steady, 20 shifted
AFTER_REFIT = 20
E2_PUBLISHED = 2.66  # ASTM E2587 / Wheeler, rounded (see the module's references)
D4_PUBLISHED = 3.27  # ASTM E2587 / Wheeler, rounded
OLD_DATABASE = Path(__file__).parent / "data" / "schema-8-refit.sql"


@dataclass
class Site:
    path: Path
    kiln: list[float]
    dryer: list[float]
    typed: Baseline

    def cli(self, *args: str) -> CliResult:
        return cli(*args, "--db", str(self.path))

    def store(self) -> Store:
        return Store.open(self.path, now=T0)


def _feed(pipe: Pipeline, stream: str, values: list[float], start: int) -> None:
    for i, v in enumerate(values):
        t = T0 + (start + i) * STEP
        pipe.process([Parsed("test", f"{v}".encode(), Reading(stream, t, v))], now=t + 1)


def _pipeline(store: Store, typed: dict[str, Baseline] | None = None) -> Pipeline:
    settings = MonitorSettings(learn_count=LEARN)
    book = AlertBook(store, AlertPolicy(clear_after=10))
    return Pipeline(store, lambda s: settings, book, (typed or {}).get)


@pytest.fixture(scope="module")
def site(tmp_path_factory: pytest.TempPathFactory) -> Site:
    path = tmp_path_factory.mktemp("versions") / "quillmoor.db"
    rng = np.random.default_rng(20260101)
    r2 = lambda a: [round(float(v), 2) for v in a]  # noqa: E731
    steady = r2(rng.normal(820.0, 1.5, 45))  # 25 learning + 20 monitored
    shifted = r2(rng.normal(826.0, 1.5, 20))  # a lasting change, then refit from these
    after = r2(rng.normal(826.0, 1.5, AFTER_REFIT))
    dryer = r2(rng.normal(11.0, 0.3, 30))
    typed = Baseline.from_limits(center=11.0, sigma=0.3, method="mean")
    with Store.open(path, now=T0) as store:
        pipe = _pipeline(store, {DRYER: typed})
        _feed(pipe, KILN, steady + shifted, 0)
        _feed(pipe, DRYER, dryer, 0)
        refit = cli(
            "baseline", "refit", KILN, "--last", str(REFIT_LAST), "--reason",
            "new burner nozzle", "--by", "ana", "--db", str(path),
        )  # fmt: skip
        assert refit.returncode == 0, refit.stderr
        assert pipe.adopt_new_baselines(T0 + BEFORE_REFIT * STEP) == [KILN]
        _feed(pipe, KILN, after, BEFORE_REFIT)
    return Site(path, steady + shifted + after, dryer, typed)


def _xmr(values: list[float]) -> tuple[float, float]:
    """Mean and average moving range of phase I readings, computed plainly."""
    a = np.array(values)
    return float(a.mean()), float(np.abs(np.diff(a)).mean())


# -- what the store keeps ------------------------------------------------------------------------


def test_each_reading_stores_the_version_that_judged_it(site: Site) -> None:
    with site.store() as store:
        kiln = store.recent_readings(KILN)
        dryer = store.recent_readings(DRYER)
        history = store.baseline_history(KILN)
        (typed,) = store.baseline_history(DRYER)
    assert [b.version for b in history] == [1, 2] and history[1].created_by == "ana"
    # Learning readings were judged by no baseline; readings of the shift came before the
    # refit was adopted, so v1 judged them although v2 was fitted from them.
    assert [r.baseline_version for r in kiln] == (
        [None] * LEARN + [1] * (BEFORE_REFIT - LEARN) + [2] * AFTER_REFIT
    )
    assert typed.created_by == CONFIG_AUTHOR and typed.version == 1
    assert {r.baseline_version for r in dryer} == {1}


def test_migration_10_adds_the_column_and_old_rows_say_unknown(tmp_path: Path) -> None:
    path = tmp_path / "v8.db"
    old = sqlite_utils.Database(path)
    assert migrate(old, now=T0, target=8)[-1] == 8
    old.execute("INSERT INTO readings (stream, time, value, idx, phase, z) "
                "VALUES (?, ?, 820.5, 30, 'monitoring', 0.25)", (KILN, T0))  # fmt: skip
    old.close()
    with Store.open(path, now=T0) as store:
        assert store.db.execute(
            "SELECT name FROM schema_migrations WHERE version = 10"
        ).fetchone() == ("the baseline version each reading was judged against",)
        judged = Outcome(Reading(KILN, T0 + 60, 821.0), True, index=31, phase="monitoring",
                         z=0.5, baseline_version=3)  # fmt: skip
        learning = Outcome(Reading(KILN, T0 + 120, 819.0), True, index=32, phase="learning")
        store.add_readings([judged, learning], now=T0 + 120)
        got = [r.baseline_version for r in store.recent_readings(KILN)]
    assert got == [None, 3, None]


# -- what the chart draws ------------------------------------------------------------------------


def test_chart_limits_per_point_are_the_stored_versions_numbers(site: Site) -> None:
    with site.store() as store:
        data = gather(store, KILN, since=None, last=None)
        readings = store.recent_readings(KILN)
        stored = {b.version: limits_of(b.numbers) for b in store.baseline_history(KILN)}
    assert [p.index for p in data.points] == [r.index for r in readings]
    per_point = limits_per_point(data.points, data.limits)
    for r, drawn in zip(readings, per_point, strict=True):
        if r.baseline_version is None:
            assert drawn is None  # learning: no limits drawn
            continue
        assert drawn is not None and drawn.version == r.baseline_version
        want = stored[r.baseline_version]
        assert want is not None
        assert (drawn.center, drawn.ucl, drawn.lcl, drawn.mr_ucl, drawn.mr_center) == (
            want.center,
            want.ucl,
            want.lcl,
            want.mr_ucl,
            want.mr_bar,
        )
    # One step, exactly at the first reading judged after the refit was adopted.
    assert [(s.version, s.start) for s in data.limits] == [(1, LEARN), (2, BEFORE_REFIT)]
    assert [s.title for s in data.limits] == ["learned", "refit by ana"]
    assert not any("z-score" in n for n in data.notes)  # every reading names its version


def test_chart_limits_equal_a_direct_xmr_computation_on_the_phase_i_readings(site: Site) -> None:
    with site.store() as store:
        data = gather(store, KILN, since=None, last=None)
    per_point = limits_per_point(data.points, data.limits)
    phase_one = {
        1: site.kiln[:LEARN],  # learned from the first 25 readings
        2: site.kiln[BEFORE_REFIT - REFIT_LAST : BEFORE_REFIT],  # refit --last 20
    }
    seen = set()
    for drawn in per_point:
        if drawn is None:
            continue
        assert drawn.version is not None
        seen.add(drawn.version)
        mean, mr_bar = _xmr(phase_one[drawn.version])
        assert drawn.center == pytest.approx(mean, rel=1e-12)
        assert drawn.mr_center == pytest.approx(mr_bar, rel=1e-12)
        assert drawn.ucl is not None and drawn.lcl is not None
        assert (drawn.ucl - mean) / mr_bar == pytest.approx(E2_PUBLISHED, abs=0.002)
        assert (mean - drawn.lcl) / mr_bar == pytest.approx(E2_PUBLISHED, abs=0.002)
        assert drawn.mr_ucl / mr_bar == pytest.approx(D4_PUBLISHED, abs=0.005)
    assert seen == {1, 2}


def test_a_refit_with_the_same_numbers_still_steps_to_its_own_version(tmp_path: Path) -> None:
    """Limits re-approved unchanged (a new version with the same numbers): the z-scores alone
    cannot tell the versions apart, the stored version of each reading can."""
    values = [round(float(v), 2) for v in np.random.default_rng(5).normal(820.0, 1.5, 55)]
    with Store.open(tmp_path / "lw.db", now=T0) as store:
        pipe = _pipeline(store)
        _feed(pipe, KILN, values[:45], 0)
        (v1,) = store.baseline_history(KILN)
        store.add_baseline(
            KILN, v1.numbers, now=T0, by="ana", reason="re-approved at audit", method="mean"
        )
        assert pipe.adopt_new_baselines(T0 + 45 * STEP) == [KILN]
        _feed(pipe, KILN, values[45:], 45)
        readings = store.recent_readings(KILN)
        history = store.baseline_history(KILN)
    found = limits_in_force(readings, history)
    assert [(s.version, s.start, s.title) for s in found] == [
        (1, LEARN, "learned"),
        (2, 45, "refit by ana"),
    ]
    assert (found[0].center, found[0].ucl) == (found[1].center, found[1].ucl)


@settings(max_examples=examples(40), deadline=None)
@given(
    switches=st.lists(st.integers(min_value=1, max_value=60), min_size=0, max_size=3, unique=True),
    same=st.lists(st.booleans(), min_size=3, max_size=3),
    seed=st.integers(min_value=0, max_value=2**32 - 1),
)
def test_stored_versions_give_the_switch_points_whatever_the_numbers(
    switches: list[int], same: list[bool], seed: int
) -> None:
    """Any schedule of adopted versions, some with the numbers of the one before: the chart's
    sets start exactly where the engine switched, each with its own version's numbers."""
    rng = np.random.default_rng(seed)
    fits = [Baseline.from_limits(center=50.0, sigma=1.0)]
    for k, repeat in enumerate(same, start=1):
        new = Baseline.from_limits(center=50.0 + 3 * k, sigma=1.0 + k / 5)
        fits.append(fits[-1] if repeat else new)
    monitor = StreamMonitor("s", MonitorSettings(rules="limits"), baseline=fits[0])
    starts = sorted(switches)
    readings = []
    for i in range(70):
        if i in starts:
            version = starts.index(i) + 2
            monitor.set_baseline(fits[version - 1], version=version)
        o = monitor.update(Reading("s", float(i), float(rng.normal(52.0, 2.0))))
        readings.append(StoredReading("s", float(i), o.reading.value, None, o.index, o.phase,
                                      o.z, o.mr, (), o.baseline_version))  # fmt: skip
    history = [
        StoredBaseline("s", v, 0.0, "ana", "refit", "mean", b.to_dict(), (), None, None, None, None)
        for v, b in enumerate(fits, start=1)
    ]
    found = limits_in_force(readings, history)
    assert [(s.version, s.start) for s in found] == [(1, 0)] + [
        (k + 2, at) for k, at in enumerate(starts)
    ]
    for s in found:
        assert s.version is not None and s.center == fits[s.version - 1].center
    assert fallback_note(readings, history) == ""


def test_a_baseline_typed_into_the_config_is_drawn_from_its_stored_version(site: Site) -> None:
    with site.store() as store:
        data = gather(store, DRYER, since=None, last=None)
    (drawn,) = data.limits
    assert (drawn.version, drawn.start, drawn.title) == (1, 0, "typed into the config")
    assert (drawn.center, drawn.sigma) == (site.typed.center, site.typed.sigma)
    assert drawn.ucl == site.typed.ucl and drawn.lcl == site.typed.lcl
    assert all(s is drawn for s in limits_per_point(data.points, data.limits))


def test_the_picture_steps_at_the_refit(site: Site, tmp_path: Path) -> None:
    svg = tmp_path / "kiln.svg"
    result = site.cli("chart", KILN, "-o", str(svg))
    assert result.returncode == 0, result.stderr
    assert "85 readings" in result.stdout and "limits v1, v2" in result.stdout
    texts = _svg_texts(svg)
    assert any(t.startswith("v1 learned:") for t in texts)
    assert any(t.startswith("v2 refit by ana:") for t in texts)
    png = tmp_path / "kiln.png"
    assert site.cli("chart", KILN, "-o", str(png)).returncode == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG specification, section 5.2


def test_readings_past_a_dropped_learned_fit_name_no_version(tmp_path: Path) -> None:
    """An operator stored version 1 while the stream was learning, and one batch ran past the
    end of learning: the monitor judged the rest of that batch against its own fit, which is
    dropped for the operator's (its number is taken). Those readings must not claim version 1:
    the chart works their limits out from their z-scores, and says so."""
    values = [round(float(v), 3) for v in np.random.default_rng(11).normal(50.0, 1.0, 35)]
    with Store.open(tmp_path / "lw.db", now=T0) as store:
        pipe = _pipeline(store)
        _feed(pipe, KILN, values[: LEARN - 1], 0)
        operator = Baseline.from_limits(center=56.0, sigma=2.0, method="mean")
        store.add_baseline(
            KILN, operator.to_dict(), now=T0, by="ana", reason="new burner", method="mean"
        )
        batch = [
            Parsed("test", b"", Reading(KILN, T0 + i * STEP, values[i])) for i in range(24, 30)
        ]
        pipe.process(batch, now=T0 + 30 * STEP)  # ends learning and runs five readings past it
        _feed(pipe, KILN, values[30:], 30)
        readings = store.recent_readings(KILN)
        history = store.baseline_history(KILN)
        data = gather(store, KILN, since=None, last=None)
    assert [r.baseline_version for r in readings] == [None] * 30 + [1] * 5
    learned = MonitorSettings(learn_count=LEARN).fit(values[:LEARN])
    recovered, stored = limits_in_force(readings, history)
    assert recovered.version is None and recovered.start == LEARN
    assert recovered.center == pytest.approx(learned.center, rel=1e-9)
    assert recovered.sigma == pytest.approx(learned.sigma, rel=1e-9)
    assert (stored.version, stored.start, stored.center) == (1, 30, 56.0)
    note = fallback_note(readings, history)
    assert note.startswith("5 reading(s) stored without the baseline version")
    assert note in data.notes


# -- limitwatch streams --------------------------------------------------------------------------


def test_streams_tells_the_last_readings_zone_against_the_version_that_judged_it(
    tmp_path: Path,
) -> None:
    path = tmp_path / "lw.db"
    values = [round(float(v), 2) for v in np.random.default_rng(3).normal(820.0, 1.5, 30)]
    with Store.open(path, now=T0) as store:
        _feed(_pipeline(store), KILN, values, 0)
        far = Baseline.from_limits(center=900.0, sigma=1.5, method="mean")
        store.add_baseline(KILN, far.to_dict(), now=T0, by="ana", reason="trial", method="mean")
        learned = limits_of(store.baseline(KILN, 1).numbers)  # type: ignore[union-attr]
    assert learned is not None
    (record,) = [r for r in _json(cli("streams", "--format", "json", "--db", str(path)))]
    # v2 is stored but not adopted: the last reading was judged against v1.
    assert (record["baseline_version"], record["last_baseline_version"]) == (2, 1)
    assert record["zone"] == learned.zone(values[-1]) != far.zone(values[-1])
    assert record["center"] == 900.0  # the current version's numbers, as before


def _json(result: CliResult) -> list[dict]:
    import json

    assert result.returncode == 0, result.stderr
    return json.loads(result.stdout)


# -- a database from before readings named their version -----------------------------------------


def _old_database(path: Path) -> Path:
    """A database written by limitwatch before migration 10 (main at d0e276b, schema 8):
    ``kiln-3/temp`` learned v1 from readings 0..24, shifted at reading 45, was refit by ana
    through ``limitwatch baseline refit --last 15`` (v2) and adopted before reading 60; 75
    readings in all. ``dryer-1/moisture`` has a baseline typed into the config (v1, 20
    readings). Kept as the SQL text Python's ``sqlite3`` ``iterdump`` wrote."""
    conn = sqlite3.connect(path)
    conn.executescript(OLD_DATABASE.read_text())
    conn.close()
    return path


def test_a_database_from_before_is_upgraded_and_charted_from_the_z_scores(tmp_path: Path) -> None:
    path = _old_database(tmp_path / "old.db")
    raw = sqlite3.connect(path)
    assert raw.execute("SELECT max(version) FROM schema_migrations").fetchone() == (8,)
    assert "baseline_version" not in {c[1] for c in raw.execute("PRAGMA table_info(readings)")}
    raw.close()
    # A read-only look refuses the old file and leaves it as it was.
    refused = cli("chart", "kiln-3/temp", "-o", str(tmp_path / "no.png"), "--db", str(path))
    assert refused.returncode != 0 and "schema version 8, older" in refused.stderr
    with Store.open(path, now=T0 + 86400) as store:  # as the service opens it: upgraded
        assert store.schema_version() == MIGRATIONS[-1].version
        readings = store.recent_readings("kiln-3/temp")
        history = store.baseline_history("kiln-3/temp")
        data = gather(store, "kiln-3/temp", since=None, last=None)
        dryer = gather(store, "dryer-1/moisture", since=None, last=None)
    assert len(readings) == 75 and {r.baseline_version for r in readings} == {None}
    # The fallback finds the versions by the stored z-scores, stepping where they changed.
    assert [(s.version, s.start) for s in data.limits] == [(1, 25), (2, 60)]
    stored = {b.version: limits_of(b.numbers) for b in history}
    for s in data.limits:
        want = stored[s.version]
        assert want is not None and (s.center, s.ucl, s.lcl) == (want.center, want.ucl, want.lcl)
    assert data.notes[0] == (
        "50 reading(s) stored without the baseline version that judged them (by an older "
        "limitwatch, say): their limits are worked out from their stored z-scores."
    )
    assert [(s.version, s.title) for s in dryer.limits] == [(1, "typed into the config")]

    # The service goes on from its checkpoints: new readings name their version, and the chart
    # joins them to the same v2 the old ones were found to have.
    more = [826.0 + (-1) ** i * 0.8 for i in range(10)]
    with Store.open(path, now=T0 + 86400) as store:
        pipe = _pipeline(store)
        assert pipe.restore() == 2
        _feed(pipe, "kiln-3/temp", more, 75)
        readings = store.recent_readings("kiln-3/temp")
        data = gather(store, "kiln-3/temp", since=None, last=None)
    assert [r.baseline_version for r in readings[75:]] == [2] * 10
    assert [(s.version, s.start) for s in data.limits] == [(1, 25), (2, 60)]
    assert data.notes[0].startswith("50 reading(s) stored without")
    shown = cli("chart", "kiln-3/temp", "-o", str(tmp_path / "old.svg"), "--db", str(path))
    assert shown.returncode == 0, shown.stderr
    assert "85 readings" in shown.stdout and "limits v1, v2" in shown.stdout
    # The footnote is under the picture, wrapped to its width rather than cut off.
    texts = _svg_texts(tmp_path / "old.svg")
    assert SAFETY_CAUTION in texts  # in smaller type, on a line of its own
    assert max(len(t) for t in texts if t != SAFETY_CAUTION) <= 135
    caption = " ".join(texts)
    assert "50 reading(s) stored without the baseline version" in caption
    assert "worked out from their stored z-scores." in caption


def _svg_texts(path: Path) -> list[str]:
    root = ET.parse(path).getroot()
    return ["".join(t.itertext()) for t in root.iter() if t.tag.endswith("}text")]
