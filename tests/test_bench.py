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
    assert names[:3] == ["engine 20 streams", "engine 300 streams", "file end to end"]
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
        assert len(figure["runs"]) == TINY.repeats
        assert figure["target_met"] in (None, True, False)


def test_figures_carry_the_conditions_they_were_measured_under(report):
    figures = {f["name"]: f for f in report["figures"]}
    engine = figures["engine 300 streams"]["conditions"]
    assert engine["streams"] == 300 and engine["rules"] == bench.ALL_DETECTORS
    assert engine["readings_per_run"] == 300
    file = figures["file end to end"]["conditions"]
    assert file["lines"] == 400 and file["streams"] == 20
    memory = figures["memory per stream at 300 streams"]
    assert "tracemalloc" in memory["conditions"]["measured"]
    assert memory["extra"]["rss_growth_bytes_per_stream"] is not None
    assert figures["restore 300 streams"]["target"] is None  # the target is for 100,000


@pytest.mark.skipif(mosquitto_path() is None, reason="mosquitto is not installed")
def test_mqtt_ratio_pairs_the_two_clients_of_the_same_run(report):
    figures = {f["name"]: f for f in report["figures"]}
    ours = figures["mqtt end to end"]["runs"]
    bare = figures["mqtt bare subscriber"]["runs"]
    ratio = figures["mqtt end to end / bare subscriber"]
    assert ratio["runs"] == pytest.approx([o / b for o, b in zip(ours, bare, strict=True)])
    assert ratio["target"] == ">= 0.7"
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
    heads = [i for i, line in enumerate(lines) if line.startswith("engine ")]
    assert len(heads) == 2
    for i in heads:
        assert "readings/s" in lines[i] and "target >= 200,000 readings/s" in lines[i]
        assert lines[i + 1].startswith("    streams: ")
        assert any("rules: nelson,ewma,cusum" in line for line in lines[i : i + 8])


def test_an_unknown_part_is_refused():
    result = CliRunner().invoke(main, ["bench", "--only", "disk"])
    assert result.exit_code == 2 and "engine" in result.output
