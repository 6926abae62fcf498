"""`limitwatch bench` runs end to end and reports every figure with its conditions.

Smoke test only: the sizes are shrunk to a few hundred readings, so the figures mean nothing
and no speed is asserted (speed targets are never timed asserts). What is checked is that each
part really ran through the real code paths and that what is printed is complete and coherent.
"""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from limitwatch import bench
from limitwatch.cli import main
from tests.broker import mosquitto_path

pytestmark = pytest.mark.integration  # the bench starts a private Mosquitto and the real service

TINY = bench.Sizes(
    repeats=1,
    engine_few=(20, 10),
    engine_many=(300, 1),
    file_lines=400,
    file_streams=20,
    mqtt_messages=300,
    mqtt_streams=20,
    latency_rate=200,
    latency_seconds=1.0,
    latency_warmup_s=0.2,
    latency_streams=20,
    memory_streams=300,
    flat_pairs=2,
)

MQTT_PARTS = ("mqtt end to end", "mqtt bare subscriber", "publish to commit")


@pytest.fixture(scope="module")
def report() -> dict:
    """One tiny run of the whole bench, as JSON, through the command itself."""
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(bench, "QUICK", TINY)
        result = CliRunner().invoke(main, ["bench", "--quick", "--json"])
    assert result.exit_code == 0, result.output
    return json.loads(result.stdout)


def test_every_part_reports_its_figures_with_conditions(report):
    names = [f["name"] for f in report["figures"]]
    assert names[:5] == [
        "engine 20 streams",
        "engine 300 streams",
        "engine 20 streams, signal-heavy",
        "engine / flat yardstick",
        "file end to end",
    ]
    heavy = {f["name"]: f for f in report["figures"]}["engine 20 streams, signal-heavy"]
    assert heavy["conditions"]["signals_per_reading"] > 0.2
    assert "memory per stream at 300 streams" in names and "restore 300 streams" in names
    assert sum(n.startswith("publish to commit") for n in names) == 2 * len(
        bench.LATENCY_BATCH_WAITS
    )
    assert report["machine"]["python"] and report["quick"] is True
    for figure in report["figures"]:
        assert figure["conditions"], figure["name"]
        if figure["skipped"]:
            assert figure["name"].startswith(MQTT_PARTS) and mosquitto_path() is None
            assert "mosquitto" in figure["skipped"]
            continue
        assert figure["value"] is not None and figure["value"] > 0, figure
        pairs = figure["name"] == "engine / flat yardstick"
        assert len(figure["runs"]) == (TINY.flat_pairs if pairs else TINY.repeats)
        assert figure["target_met"] in (None, True, False)
        if not figure["name"].startswith(("mqtt bare", "mqtt end to end /", "publish")):
            assert " / " in figure["conditions"]["load_average"], figure["name"]


def test_figures_carry_the_conditions_they_were_measured_under(report):
    figures = {f["name"]: f for f in report["figures"]}
    engine = figures["engine 300 streams"]["conditions"]
    assert engine["streams"] == 300 and engine["rules"] == bench.ALL_DETECTORS
    assert engine["readings_per_run"] == 300
    file = figures["file end to end"]["conditions"]
    assert file["lines"] == 400 and file["streams"] == 20
    assert "CPU time" in figures["engine 300 streams"]["conditions"]["clock"]
    extra = figures["engine 300 streams"]["extra"]
    assert extra["wall_clock_readings_per_s"] > 0 and extra["cpu_us_per_reading"] > 0
    flat = figures["engine / flat yardstick"]
    assert flat["target"] == ">= 0.5" and flat["conditions"]["streams"] == 20
    assert all(r > 0 for r in flat["runs"]) and "identical" in flat["conditions"]["signals_checked"]
    assert figures["file end to end"]["extra"]["cpu_us_per_reading"] > 0
    memory = figures["memory per stream at 300 streams"]
    assert "resident" in memory["conditions"]["measured"]
    assert memory["extra"]["tracemalloc_bytes_per_stream"] > 0
    restore = figures["restore 300 streams"]
    assert "CPU time" in restore["conditions"]["measured"] and restore["extra"]["wall_seconds"] > 0
    assert restore["target"] is None  # the target is for 100,000


@pytest.mark.skipif(mosquitto_path() is None, reason="mosquitto is not installed")
def test_mqtt_ratio_pairs_the_two_clients_of_the_same_run(report):
    figures = {f["name"]: f for f in report["figures"]}
    ours = figures["mqtt end to end"]["runs"]
    bare = figures["mqtt bare subscriber"]["runs"]
    ratio = figures["mqtt end to end / bare subscriber"]
    assert ratio["runs"] == pytest.approx([o / b for o, b in zip(ours, bare, strict=True)])
    assert ratio["target"] == ">= 0.8"
    cpu = figures["mqtt CPU per message, end to end / bare subscriber"]
    assert cpu["target"] == "<= 1.5" and all(r > 0 for r in cpu["runs"])
    assert figures["mqtt bare subscriber"]["extra"]["cpu_us_per_message"] > 0
    live = figures["mqtt end to end, live publisher"]
    assert len(live["runs"]) == TINY.repeats and live["extra"]["publisher_messages_per_s"] > 0
    assert "as fast as the broker acknowledges" in live["conditions"]["how"]
    for batch_wait, _ in bench.LATENCY_BATCH_WAITS:
        p50 = figures[f"publish to commit p50, batch_wait {batch_wait}"]["value"]
        p99 = figures[f"publish to commit p99, batch_wait {batch_wait}"]["value"]
        assert 0 < p50 <= p99


def test_text_output_prints_each_figure_then_its_conditions(monkeypatch):
    monkeypatch.setattr(bench, "QUICK", TINY)
    result = CliRunner().invoke(main, ["bench", "--quick", "--only", "engine"])
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert lines[0].startswith("limitwatch bench on ") and "(quick sizes)" in lines[0]
    assert "load average " in lines[0] and "(1/5/15 min)" in lines[0]
    heads = [i for i, line in enumerate(lines) if line.startswith("engine ")]
    assert len(heads) == 4
    flat = lines[heads.pop()]
    assert flat.startswith("engine / flat yardstick: ") and "target >= 0.50: " in flat
    assert "signal-heavy" in lines[heads.pop()]
    for i in heads:
        assert "readings/s" in lines[i] and "target >= 200,000 readings/s" in lines[i]
        assert lines[i + 1].startswith("    streams: ")
        assert any("rules: nelson,ewma,cusum" in line for line in lines[i : i + 8])


def test_an_unknown_part_is_refused():
    result = CliRunner().invoke(main, ["bench", "--only", "disk"])
    assert result.exit_code == 2 and "engine" in result.output


def test_the_flat_yardstick_raises_exactly_the_engines_signals():
    """The comparison means something only if the yardstick does the engine's work: on streams
    full of shifts, trends and zigzags it must raise the same signals, rule for rule."""
    import numpy as np

    from limitwatch.bench_flat import new_state

    rng = np.random.default_rng(3)
    monitors = bench._engine_monitors(5, bench.ALL_DETECTORS)
    states = [new_state(0.0, 1.0) for _ in monitors]
    names = [m.stream for m in monitors]
    rounds = bench._engine_rounds(names, 2_000, rng, 0)
    for k, readings in enumerate(rounds):  # shifted, drifting and zigzag stretches
        shape = (k // 100) % 4
        for i, r in enumerate(readings):
            bump = [0.0, 1.5, 0.02 * (k % 100), 2.5 * (-1) ** k][shape] * (1 if i % 2 else -1)
            readings[i] = type(r)(r.stream, r.time, r.value * (0.3 if shape == 3 else 1) + bump)
    engine, flat = bench._run_engine(monitors, rounds), bench._run_flat(states, rounds)
    assert engine == flat
    assert {rule for rule, *_ in engine} == {
        "beyond-limits", "run-one-side", "trend", "alternating", "two-of-three-zone-a",
        "four-of-five-zone-b", "hugging-center", "avoiding-center", "ewma", "cusum",
        "mr-beyond-limit",
    }  # fmt: skip
