"""Chart pictures and the HTML report, through the installed console script, against a real
SQLite file filled the way the service fills it: readings through the real Pipeline (StreamMonitor
+ AlertBook), a refit through the real ``limitwatch baseline refit`` command, then adopted by the
pipeline as the service's scheduler would.

The plant is invented (a mill gearbox, a press, a motor); the readings are seeded random numbers.

External references used below:

* PNG: W3C, *Portable Network Graphics (PNG) Specification*, 2nd ed., sections 5.2 (the 8-byte
  signature) and 11.2.2 (IHDR: width and height as 4-byte big-endian integers right after the
  chunk length and type, i.e. at bytes 16..24 of the file).
* d2 = 1.128 for moving ranges of two readings: Montgomery, *Introduction to Statistical Quality
  Control*, Appendix VI (sigma = MRbar / d2).
"""

from __future__ import annotations

import os
import re
import struct
import subprocess
import xml.etree.ElementTree as ET
from dataclasses import dataclass, replace
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote, urlparse

import click
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from limitwatch import SAFETY_CAUTION
from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy
from limitwatch.charts import (
    ChartData,
    Flag,
    LimitSet,
    Point,
    caption_lines,
    cluster_flags,
    render,
    spans,
)
from limitwatch.charts.gather import (
    flags_from_alerts,
    limits_in_force,
    signal_flags,
)
from limitwatch.charts.report import Section, image_name, render_page
from limitwatch.cli.charts import parse_since
from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.model import Reading
from limitwatch.pipeline import Parsed, Pipeline
from limitwatch.stats.baseline import Baseline
from limitwatch.store import Store, StoredReading
from tests.helpers import CLI, CliResult, cli, examples

D2 = 1.128  # Montgomery, Introduction to SQC, Appendix VI, n = 2
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification, section 5.2
FLAG_RGB = (0xC2, 0x41, 0x2D)  # the marker colour of flagged readings (limitwatch.charts.FLAG)

GEARBOX = "mill-4/gearbox-temp"
PRESS = "press-2/cycle-time"
MOTOR = "mill-4/motor-current"
T0 = 1_803_859_200.0  # 2027-03-01T00:00:00Z
STEP = 600.0
LEARN = 25
REFIT_AT = 80  # index of the first gearbox reading fed after the refit was adopted


@dataclass
class Plant:
    path: Path
    gearbox: list[float]

    def cli(self, *args: str) -> CliResult:
        return cli(*args, "--db", str(self.path))

    def store(self) -> Store:
        return Store.open(self.path, now=T0)


def _feed(pipe: Pipeline, stream: str, values: list[float], start: int) -> None:
    for i, v in enumerate(values):
        t = T0 + (start + i) * STEP
        pipe.process([Parsed("test", f"{v}".encode(), Reading(stream, t, v))], now=t + 1)


@pytest.fixture(scope="module")
def plant(tmp_path_factory: pytest.TempPathFactory) -> Plant:
    path = tmp_path_factory.mktemp("charts") / "plant.db"
    rng = np.random.default_rng(20270301)
    r2 = lambda a: [round(float(v), 2) for v in a]  # noqa: E731
    in_control = r2(rng.normal(62.0, 0.6, 60))  # 25 learning + 35 monitored
    shifted = r2(rng.normal(64.4, 0.6, 20))  # a sustained shift of about 4 sigma
    after = r2(rng.normal(64.4, 0.6, 15))
    after[12] = 72.0  # one wild reading, three from the end: its alerts stay open
    with Store.open(path, now=T0) as store:
        book = AlertBook(store, AlertPolicy(clear_after=10))
        pipe = Pipeline(store, lambda s: MonitorSettings(learn_count=LEARN), book)
        _feed(pipe, GEARBOX, in_control + shifted, 0)
        refit = cli(
            "baseline", "refit", GEARBOX, "--last", "20", "--reason", "new bearing fitted",
            "--by", "ana", "--db", str(path),
        )  # fmt: skip
        assert refit.returncode == 0, refit.stderr
        assert pipe.adopt_new_baselines(T0 + REFIT_AT * STEP) == [GEARBOX]
        _feed(pipe, GEARBOX, after, REFIT_AT)

        press = r2(rng.normal(41.0, 1.5, 40))
        press[38] = 58.0
        _feed(pipe, PRESS, press, 0)
        _feed(pipe, MOTOR, r2(rng.normal(31.0, 1.2, 12)), 0)  # still learning

        (press_alert,) = [a for a in store.live_alerts([PRESS]) if a.rule == "beyond-limits"]
        store.acknowledge(press_alert.id, by="lee", note="checking the die", now=T0 + 40 * STEP)
    return Plant(path, in_control + shifted + after)


# -- pictures ------------------------------------------------------------------------------------


def _png_size(path: Path) -> tuple[int, int]:
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def _flag_pixels(path: Path) -> int:
    """Pixels of the flag colour inside the two plot areas (the legend above them also shows a
    flag marker, so it is left out)."""
    import matplotlib.image as mpimg

    rgb = (mpimg.imread(path)[95:600, 66:1026, :3] * 255).round().astype(int)
    return int((np.abs(rgb - np.array(FLAG_RGB)).max(axis=-1) <= 6).sum())


def test_png_chart_is_a_valid_image_of_the_expected_size(plant: Plant, tmp_path: Path) -> None:
    out = tmp_path / "gearbox.png"
    result = plant.cli("chart", GEARBOX, "-o", str(out))
    assert result.returncode == 0, result.stderr
    assert "limits v1, v2" in result.stdout
    assert _png_size(out) == (1200, 800)
    import matplotlib.image as mpimg

    pixels = mpimg.imread(out)
    assert pixels.shape[:2] == (800, 1200)
    assert pixels[..., :3].std() > 0.05  # something is drawn
    assert _flag_pixels(out) > 100  # flagged readings are marked

    quiet = tmp_path / "motor.png"
    result = plant.cli("chart", MOTOR, "-o", str(quiet))
    assert result.returncode == 0, result.stderr
    assert "no limits yet" in result.stdout
    assert _png_size(quiet) == (1200, 800)
    assert _flag_pixels(quiet) == 0  # nothing signalled while learning


def _svg_texts(path: Path) -> list[str]:
    root = ET.parse(path).getroot()
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    return ["".join(t.itertext()) for t in root.iter("{http://www.w3.org/2000/svg}text")]


def test_svg_chart_names_the_rules_versions_numbers_and_caution(
    plant: Plant, tmp_path: Path
) -> None:
    out = tmp_path / "gearbox.svg"
    result = plant.cli("chart", GEARBOX, "--last", "60", "-o", str(out))
    assert result.returncode == 0, result.stderr
    texts = _svg_texts(out)
    joined = "\n".join(texts)
    with plant.store() as store:
        alerts = [a for a in store.alerts() if a.stream == GEARBOX]
    in_window = {
        t.rule
        for a in alerts
        for t in a.rules.values()
        if t.last_index is not None and t.last_index >= 35
    }
    assert {"beyond-limits", "mr-beyond-limit"} <= in_window
    for rule in in_window:
        assert rule in joined, rule
    assert "v1" in joined and "v2 refit by ana" in joined
    assert SAFETY_CAUTION in texts

    # The caption's numbers for v2 against a computation from the readings it was fitted on.
    fitted = np.array(plant.gearbox[60:80])
    (line,) = [t for t in texts if t.startswith("v2 refit by ana:")]
    center = float(re.search(r"center ([-\d.]+)", line).group(1))
    sigma = float(re.search(r"sigma ([-\d.]+)", line).group(1))
    ucl = float(re.search(r"UCL ([-\d.]+)", line).group(1))
    assert center == pytest.approx(fitted.mean(), rel=1e-4)
    mr_bar = np.abs(np.diff(fitted)).mean()
    assert sigma == pytest.approx(mr_bar / D2, rel=1e-3)
    assert ucl == pytest.approx(fitted.mean() + 3 * mr_bar / D2, rel=1e-3)
    assert "n 20" in line


def test_since_takes_a_span_back_from_the_newest_reading(plant: Plant, tmp_path: Path) -> None:
    out = tmp_path / "recent.png"
    result = plant.cli("chart", GEARBOX, "--since", "2h", "-o", str(out))
    assert result.returncode == 0, result.stderr
    # Readings every 10 minutes: the newest one and the twelve before it lie within two hours.
    assert "13 readings" in result.stdout
    assert _png_size(out) == (1200, 800)


def test_unknown_stream_and_bad_output_are_clear_errors(plant: Plant, tmp_path: Path) -> None:
    out = tmp_path / "nothing.png"
    result = plant.cli("chart", "mill-9/nothing", "-o", str(out))
    assert result.returncode == 1
    assert result.stderr.startswith("Error:") and "mill-9/nothing" in result.stderr
    assert "Traceback" not in result.stderr
    assert not out.exists()

    result = plant.cli("chart", GEARBOX, "-o", str(tmp_path / "chart.jpg"))
    assert result.returncode == 2
    assert ".png or .svg" in result.stderr


def test_missing_matplotlib_gives_the_install_hint(plant: Plant, tmp_path: Path) -> None:
    blocker = tmp_path / "blocker" / "matplotlib"
    blocker.mkdir(parents=True)
    (blocker / "__init__.py").write_text("raise ImportError('matplotlib is hidden by the test')\n")
    env = {**os.environ, "PYTHONPATH": str(blocker.parent)}
    out = tmp_path / "never.png"
    for args in (["chart", GEARBOX, "-o", str(out)], ["report", "--out", str(tmp_path / "r")]):
        result = subprocess.run(
            [str(CLI), *args, "--db", str(plant.path)],
            capture_output=True,
            text=True,
            env=env,
            timeout=60,
        )
        assert result.returncode == 1, result.stderr
        assert "pip install 'limitwatch[charts]'" in result.stderr
        assert "Traceback" not in result.stderr
    assert not out.exists()


# -- the report ----------------------------------------------------------------------------------


class _Page(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.links: list[str] = []
        self.ids: set[str] = set()
        self.rows: list[list[str]] = []
        self.tags: list[str] = []
        self._row: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        for name, value in attrs:
            if name in ("href", "src") and value is not None:
                self.links.append(value)
            if name == "id" and value is not None:
                self.ids.add(value)
        if tag == "tr":
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._row.append("")

    def handle_endtag(self, tag: str) -> None:
        if tag == "tr" and self._row is not None:
            self.rows.append(self._row)
            self._row = None

    def handle_data(self, data: str) -> None:
        if self._row:
            self._row[-1] += data


def test_report_links_resolve_and_lists_the_open_alerts(plant: Plant, tmp_path: Path) -> None:
    out = tmp_path / "report"
    result = plant.cli("report", "--out", str(out))
    assert result.returncode == 0, result.stderr
    index = out / "index.html"
    text = index.read_text(encoding="utf-8")
    page = _Page()
    page.feed(text)

    # Offline: nothing fetched from elsewhere, every link resolves inside the folder.
    assert "<script" not in text and "http://" not in text and "https://" not in text
    assert page.links
    images = [link for link in page.links if link.endswith(".png")]
    assert len(images) == 3
    for link in page.links:
        parsed = urlparse(link)
        assert not parsed.scheme and not parsed.netloc, link
        if link.startswith("#"):
            assert link[1:] in page.ids, link
        else:
            target = out / unquote(parsed.path)
            assert target.is_file(), link
            assert target.resolve().parent == out.resolve()
    for link in images:
        assert _png_size(out / link) == (1200, 800)

    # The caution comes first, before any stream.
    assert text.index(SAFETY_CAUTION) < text.index("<h2")

    # Every open or acknowledged alert is in a table row with its rule and state.
    with plant.store() as store:
        live = store.live_alerts()
    assert {a.state for a in live} == {"open", "acknowledged"}
    for alert in live:
        (row,) = [r for r in page.rows if r and r[0] == str(alert.id)]
        assert any(alert.rule in cell for cell in row) and alert.state in row, row
    assert len([r for r in page.rows if r and r[0].isdigit()]) == len(live)


# -- what the chart is built from ----------------------------------------------------------------


def test_limits_in_force_find_the_readings_where_each_version_took_effect(plant: Plant) -> None:
    with plant.store() as store:
        readings = store.recent_readings(GEARBOX)
        history = store.baseline_history(GEARBOX)
    found = limits_in_force(readings, history)
    # By construction: v1 judged the first reading after learning, v2 the first reading fed after
    # the pipeline adopted the refit.
    assert [(s.version, s.start) for s in found] == [(1, LEARN), (2, REFIT_AT)]
    assert found[1].title == "refit by ana"


def test_every_beyond_limits_signal_is_marked(plant: Plant) -> None:
    with plant.store() as store:
        readings = store.recent_readings(GEARBOX)
        history = store.baseline_history(GEARBOX)
        alerts = [a for a in store.alerts() if a.stream == GEARBOX]
    flags = flags_from_alerts(alerts, readings, limits_in_force(readings, history))
    marked = {(f.index, f.rule) for f in flags}
    # Each rule of each incident is counted on its own (incident_rules).
    tallies = [t for a in alerts for t in a.rules.values()]
    for t in tallies:
        assert (t.first_index, t.rule) in marked and (t.last_index, t.rule) in marked
        if t.rule == "beyond-limits":
            inside = [i for i, r in marked if r == t.rule and t.first_index <= i <= t.last_index]
            assert len(inside) == t.signal_count  # the lifecycle counted every signal
    shift = [t for t in tallies if t.rule == "beyond-limits" and t.signal_count > 5]
    assert shift, "the sustained shift should have signalled beyond the limits many times"


def test_every_signal_the_engine_gave_is_marked_and_nothing_else(plant: Plant) -> None:
    # The store records each reading's signals; the same readings through a fresh monitor
    # must give exactly the marks the chart draws, run rules at every signal included.
    with plant.store() as store:
        readings = store.recent_readings(PRESS)
        alerts = [a for a in store.alerts() if a.stream == PRESS]
        flags = signal_flags(alerts, readings, limits_in_force(readings, []))
    monitor = StreamMonitor(PRESS, MonitorSettings(learn_count=LEARN))
    expected = set()
    for r in readings:
        outcome = monitor.update(Reading(PRESS, r.time, r.value))
        expected |= {(outcome.index, s.rule, s.chart) for s in outcome.signals}
    assert expected, "the wild press reading must have signalled"
    assert {(f.index, f.rule, f.chart) for f in flags} == expected


def test_readings_from_before_signals_were_recorded_fall_back_on_the_alerts(plant: Plant) -> None:
    with plant.store() as store:
        readings = store.recent_readings(GEARBOX)
        history = store.baseline_history(GEARBOX)
        alerts = [a for a in store.alerts() if a.stream == GEARBOX]
    limits = limits_in_force(readings, history)
    unrecorded = [replace(r, signals=None) for r in readings]
    assert signal_flags(alerts, unrecorded, limits) == flags_from_alerts(alerts, readings, limits)
    recorded = signal_flags(alerts, readings, limits)
    assert set(flags_from_alerts(alerts, readings, limits)) <= set(recorded)


def test_limits_typed_into_the_config_are_recovered_from_the_z_scores() -> None:
    typed = Baseline.from_limits(center=120.0, sigma=2.5)
    monitor = StreamMonitor("oven-2/energy", MonitorSettings(rules="limits"), baseline=typed)
    rng = np.random.default_rng(5)
    readings = []
    for i, v in enumerate(rng.normal(120.0, 2.5, 30)):
        o = monitor.update(Reading("oven-2/energy", float(i), float(v)))
        readings.append(StoredReading("oven-2/energy", float(i), o.reading.value, None, o.index,
                                      o.phase, o.z, o.mr))  # fmt: skip
    (found,) = limits_in_force(readings, [])
    assert found.version is None and found.start == 0
    assert found.center == pytest.approx(120.0, abs=1e-9)
    assert found.sigma == pytest.approx(2.5, rel=1e-9)


@settings(max_examples=examples(40), deadline=None)
@given(
    switches=st.lists(st.integers(min_value=1, max_value=60), min_size=0, max_size=3, unique=True),
    seed=st.integers(min_value=0, max_value=2**32 - 1),
)
def test_version_changes_are_found_wherever_they_happen(switches: list[int], seed: int) -> None:
    """Any schedule of refits: the reading-by-reading inference gives back the exact switch
    points, whatever the values."""
    rng = np.random.default_rng(seed)
    versions = [Baseline.from_limits(center=50.0 + 3 * k, sigma=1.0 + 0.2 * k) for k in range(4)]
    monitor = StreamMonitor("s", MonitorSettings(rules="limits"), baseline=versions[0])
    starts = sorted(switches)
    readings, history = [], []
    for i in range(70):
        if i in starts:
            version = starts.index(i) + 2
            monitor.set_baseline(versions[version - 1], version=version)
        o = monitor.update(Reading("s", float(i), float(rng.normal(52.0, 2.0))))
        readings.append(StoredReading("s", float(i), o.reading.value, None, o.index, o.phase,
                                      o.z, o.mr))  # fmt: skip
    from limitwatch.store import Baseline as Stored

    for v, b in enumerate(versions, start=1):
        history.append(Stored("s", v, 0.0, "limitwatch", "learned", "mean", b.to_dict(), (),
                              None, None, None, None))  # fmt: skip
    found = limits_in_force(readings, history)
    assert [(s.version, s.start) for s in found] == [(1, 0)] + [
        (k + 2, at) for k, at in enumerate(starts)
    ]


def test_since_parsing() -> None:
    assert parse_since("2027-03-01T06:00:00Z", None) == T0 + 6 * 3600
    assert parse_since(str(T0), 0.0) == T0
    assert parse_since("1h30m", T0) == T0 - 5400
    for bad in ("yesterday-ish", "2027-13-45", ""):
        with pytest.raises(click.BadParameter, match=r"neither a time .* nor a span"):
            parse_since(bad, T0)


def test_spans_clusters_and_caption_agree_with_the_data() -> None:
    pts = [Point(i, 60.0 * i, 10.0, None, i < 5) for i in range(20)]
    v1 = LimitSet(1, 5, 10.0, 1.0, 13.0, 7.0, 1.128, 3.686, 5, "mean", title="learned")
    v2 = LimitSet(2, 12, 11.0, 0.5, 12.5, 9.5, 0.564, 1.843, 7, "median", title="refit by ana")
    assert [(s.version, a, b) for s, a, b in spans(pts, [v2, v1])] == [(1, 5, 12), (2, 12, 20)]
    # Flags two apart form one cluster; a lone one keeps its own label.
    keyed = [(6, ("beyond-limits",)), (8, ("beyond-limits", "run-one-side")), (15, ("trend",))]
    assert cluster_flags(keyed) == [([6, 8], "beyond-limits ×2\nrun-one-side"), ([15], "trend")]
    data = ChartData("s", tuple(pts), (v1, v2), (Flag(6, "beyond-limits"), Flag(99, "trend")))
    lines = caption_lines(data)
    assert lines[0].startswith("v1 learned: center 10 ")
    assert "sigma from the median moving range" in lines[1]
    assert lines[2] == "flagged: 1 reading(s): beyond-limits ×1"  # index 99 is not drawn
    learning = caption_lines(ChartData("s", tuple(pts[:5])))
    assert learning == ["no limits yet: the stream is still learning its baseline"]


def test_report_page_escapes_and_keeps_names_apart() -> None:
    taken: set[str] = {"index.html"}
    names = [image_name(s, taken) for s in ("a/b", "a:b", "A/B", "../etc")]
    assert len({n.lower() for n in names}) == 4
    assert all(re.fullmatch(r"[A-Za-z0-9._-]+\.png", n) and ".." not in n for n in names)
    html = render_page(
        [Section("<x>", "x.png", [], []), Section("<x>?", None, [], [])],
        generated="now",
        source="db",
    )
    assert "&lt;x&gt;" in html and "<x>" not in html
    ids = re.findall(r'id="([^"]+)"', html)
    assert len(ids) == len(set(ids)) == 2


def test_rule_labels_never_overlap_even_when_clusters_crowd_together() -> None:
    # Clusters three readings apart at alternating heights, each with a label several lines
    # tall: the first placement alone let neighbours at different heights collide.
    pytest.importorskip("matplotlib")
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.text import Text

    from limitwatch import charts

    rng = np.random.default_rng(11)
    values = [20.0 + float(v) for v in rng.normal(0.0, 3.0, 70)]
    pts = tuple(Point(i, T0 + STEP * i, values[i], None, i < 30) for i in range(70))
    limits = (LimitSet(1, 30, 20.0, 3.0, 29.0, 11.0, 3.384, 11.06, 30, "mean", title="learned"),)
    rules = ["beyond-limits", "four-of-five-zone-b", "run-one-side", "two-of-three-zone-a"]
    flags = []
    for k, start in enumerate(range(32, 68, 3)):
        values[start] = 30.0 + 4.0 * (k % 3)  # peaks at different heights
        flags += [Flag(start, rule) for rule in rules[: 2 + k % 3]]
    pts = tuple(replace(p, value=values[p.index]) for p in pts)
    fig = Figure(figsize=(12, 8), dpi=100)
    FigureCanvasAgg(fig)
    charts.draw_figure(fig, ChartData("pack-9/downtime", pts, limits, tuple(flags)))
    renderer = fig.canvas.get_renderer()
    boxes = []
    for axis in fig.axes:
        for text in axis.texts:
            if any(rule in text.get_text() for rule in rules):
                text.update_positions(renderer)
                boxes.append(Text.get_window_extent(text, renderer))
    assert len(boxes) >= 4
    clashes = [(a, b) for i, a in enumerate(boxes) for b in boxes[i + 1 :] if a.overlaps(b)]
    assert clashes == []


def test_a_chart_shows_each_incident_span_with_its_rules_and_silences_as_gaps(
    tmp_path: Path,
) -> None:
    from limitwatch.charts import IncidentSpan, Silence, silences

    t0 = 1_800_000_000.0
    times = [t0 + 60.0 * i for i in range(20)] + [
        t0 + 60.0 * 19 + 7200 + 60.0 * i for i in range(10)
    ]
    rng = np.random.default_rng(5)
    points = tuple(
        Point(i, t, float(v), None if i == 0 else 1.0, i < 10)
        for i, (t, v) in enumerate(zip(times, rng.normal(10.0, 1.0, 30), strict=True))
    )
    gaps = silences(points)
    # The one gap of two hours among one-minute readings, and nothing else.
    assert [(g.start, g.end) for g in gaps] == [(times[19], times[20])]
    limits = LimitSet(1, 10, center=10.0, sigma=1.0, ucl=13.0, lcl=7.0, mr_center=1.128,
                      mr_ucl=3.686, n=10, method="mean")  # fmt: skip
    data = ChartData(
        "hall-b/pump-7",
        points,
        (limits,),
        incidents=(
            IncidentSpan(3, times[12], times[16], ("beyond-limits", "trend")),
            IncidentSpan(4, times[29], None, ("stale",)),
        ),
        silences=(*gaps, Silence(times[29], None, times[29] + 3600.0)),
    )
    out = render(data, tmp_path / "pump.svg")
    texts = _svg_texts(out)
    assert "incident 3: beyond-limits, trend" in texts
    assert "incident 4: stale (live)" in texts
    assert "silent 2h" in texts  # from the last reading before the gap to the first after
    assert "silent 1h, still" in texts  # drawn up to the check that found it silent
