"""Sources are plugins: every registered one keeps the contract, is documented and tested, and a
third-party source runs through the real service with nothing but its own package."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from importlib.metadata import entry_points
from pathlib import Path

import pytest

from limitwatch.config import SourceSettings, config_from_dict
from limitwatch.ingest.base import Source
from limitwatch.ingest.registry import SOURCES
from limitwatch.plugins import UnknownPluginError

ROOT = Path(__file__).parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")
BUILT_INS = sorted(ep.name for ep in entry_points(group="limitwatch.sources"))


def test_the_built_in_sources_are_registered_through_the_entry_point_group():
    assert {"mqtt", "file"} <= set(BUILT_INS)
    assert SOURCES.known_types() == BUILT_INS


@pytest.mark.parametrize("kind", BUILT_INS)
def test_every_registered_source_keeps_the_contract(kind):
    cls = SOURCES.load(kind)
    assert issubclass(cls, Source)
    assert issubclass(cls.Settings, SourceSettings)
    assert cls.Settings.model_fields["type"].annotation.__args__ == (kind,)


def _readme_section(kind: str) -> str:
    title = f'\n### `[[sources]]` with `type = "{kind}"`'
    assert title in README, f"README has no section {title.strip()}"
    start = README.index(title)
    ends = [i for i in (README.find("\n### ", start + 1), README.find("\n## ", start + 1)) if i > 0]
    return README[start : min(ends)]


@pytest.mark.parametrize("kind", BUILT_INS)
def test_every_registered_source_is_in_the_readme_reference(kind):
    """Its own section, naming every key of its settings model (and of the tables nested in
    it, such as MQTT's topics and TLS)."""
    text = _readme_section(kind)
    models = [SOURCES.settings_model(kind)]
    keys: list[str] = []
    while models:
        model = models.pop()
        for name, field in model.model_fields.items():
            keys.append(name)
            for tp in (field.annotation, *getattr(field.annotation, "__args__", ())):
                inner = getattr(tp, "__args__", (tp,))
                models.extend(
                    t for t in inner if isinstance(t, type) and hasattr(t, "model_fields")
                )
    missing = sorted({k for k in keys if f"`{k}`" not in text})
    assert not missing, f"README's {kind} source section does not document {missing}"


@pytest.mark.parametrize("kind", BUILT_INS)
def test_every_registered_source_has_an_integration_test_through_the_service(kind):
    """A test module named for it that configures it and runs the real service."""
    found = []
    for path in sorted((ROOT / "tests").glob(f"test_service_{kind}*.py")):
        text = path.read_text(encoding="utf-8")
        configures = re.search(rf"""type\s*=\s*\\?["']{kind}\\?["']""", text)
        runs = "ServiceProcess" in text or "Service(" in text
        if configures and runs:
            found.append(path.name)
    assert found, f"no tests/test_service_{kind}*.py configures type = {kind!r} and runs it"


def test_an_unknown_source_type_lists_the_installed_ones():
    with pytest.raises(UnknownPluginError, match=r"unknown source type 'historian'.*file.*mqtt"):
        SOURCES.load("historian")


PLUGIN = '''
from typing import Literal, Self

from limitwatch.config import SourceSettings
from limitwatch.ingest.base import Item, Parsed, Source
from limitwatch.ingest.payload import PayloadError, parse_value
from limitwatch.model import Reading


class MeterSettings(SourceSettings):
    type: Literal["meter"] = "meter"
    stream: str
    values: list[str]
    poll_every: float = 0.2


class MeterSource(Source):
    """A polled source that reads a fixed list of values once, one reading a second."""

    Settings = MeterSettings

    @classmethod
    def from_settings(cls, settings, context):
        source = cls(settings)
        source.poll_every = settings.poll_every
        source.done = int(context.positions.get("next", 0))
        return source

    def poll(self):
        values = self.settings.values
        return [Item(self.name, v.encode(), float(i)) for i, v in enumerate(values)][self.done :]

    def parse(self, item, received_at):
        try:
            value = parse_value(item.raw.decode(), "value")
        except PayloadError as exc:
            return Parsed(self.name, item.raw, error=exc.reason, detail=exc.message)
        moment = 1_700_000_000.0 + 60 * item.received_at
        return Parsed(self.name, item.raw, reading=Reading(self.settings.stream, moment, value))

    def positions(self, items):
        return {"next": self.done + len(items)} if items else {}

    def acknowledge(self, items):
        self.done += len(items)
'''

RUN = """
import json, sys, threading, time
from limitwatch.config import load_config
from limitwatch.service import Service

before = set(sys.modules)
config = load_config(sys.argv[1])
service = Service(config)
done = threading.Event()

def work():
    service.start()
    try:
        service.run()
    finally:
        service.close()
        done.set()

threading.Thread(target=work, daemon=True).start()
deadline = time.monotonic() + 30
while time.monotonic() < deadline and not (service.store and service.last_commit):
    time.sleep(0.1)
time.sleep(1.0)
service.request_stop()
done.wait(30)
print(json.dumps({
    "loaded": sorted(m for m in set(sys.modules) - before if m.startswith(("paho", "limitwatch"))),
}))
"""


def test_a_third_party_source_runs_through_the_real_service_from_its_own_package(tmp_path):
    """One package and one entry point: the config validates its keys (by key path), the
    worker polls it, commits its readings and dead letters with its position, and nothing of
    the built-in sources it does not use is imported (no MQTT client)."""
    site = tmp_path / "site"
    (site / "plant_meter").mkdir(parents=True)
    (site / "plant_meter" / "__init__.py").write_text(PLUGIN)
    dist = site / "plant_meter-1.0.dist-info"
    dist.mkdir()
    (dist / "METADATA").write_text("Metadata-Version: 2.1\nName: plant-meter\nVersion: 1.0\n")
    (dist / "entry_points.txt").write_text(
        "[limitwatch.sources]\nmeter = plant_meter:MeterSource\n"
    )
    config = tmp_path / "site.toml"
    config.write_text(
        '[store]\npath = "meter.db"\n\n'
        '[[sources]]\ntype = "meter"\nname = "meter-1"\nstream = "boiler-1/steam-flow"\n'
        'values = ["12.5", "12.7", "n/a", "12.6"]\n'
    )
    env = {**os.environ, "PYTHONPATH": str(site)}
    done = subprocess.run(
        [sys.executable, "-c", RUN, str(config)],
        env=env,
        capture_output=True,
        text=True,
        timeout=90,
        cwd=tmp_path,
    )
    assert done.returncode == 0, done.stderr
    loaded = json.loads(done.stdout)["loaded"]
    assert "limitwatch.ingest.files.source" not in loaded
    assert not [m for m in loaded if m.startswith(("paho", "limitwatch.ingest.mqtt"))]

    import sqlite3

    db = sqlite3.connect(tmp_path / "meter.db")
    try:
        readings = db.execute("SELECT stream, value FROM readings ORDER BY time").fetchall()
        letters = db.execute("SELECT source, reason FROM dead_letters").fetchall()
        offsets = db.execute("SELECT source, byte_offset FROM file_offsets").fetchall()
    finally:
        db.close()
    assert readings == [("boiler-1/steam-flow", v) for v in (12.5, 12.7, 12.6)]
    assert [(s, r.split(":")[0]) for s, r in letters] == [("meter-1", "not-a-number")]
    assert offsets == [("meter-1", 4)]

    # Its settings model is checked like a built-in's: unknown keys by their path.
    check = subprocess.run(
        [
            sys.executable,
            "-c",
            "import sys; from limitwatch.config import config_from_dict, ConfigError\n"
            "try:\n"
            "    config_from_dict({'sources': [{'type': 'meter', 'name': 'm', 'stream': 's',"
            " 'values': [], 'valeus': []}]})\n"
            "except ConfigError as exc:\n"
            "    print(exc.problems[0].path)",
        ],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert check.stdout.strip() == "sources[0].valeus", check.stderr


def test_a_config_with_one_source_type_imports_only_that_plugin():
    code = (
        "import sys, json\n"
        "from limitwatch.config import config_from_dict\n"
        "config_from_dict({'sources': [{'type': 'file', 'name': 'x', 'glob': '/srv/*.csv',"
        " 'format': 'csv', 'value': 'v', 'time': 't', 'stream': 's'}]})\n"
        "print(json.dumps(sorted(m for m in sys.modules if m.startswith(('paho', "
        "'limitwatch.ingest.mqtt')))))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=True
    )
    assert json.loads(done.stdout) == []


def test_source_settings_carry_the_common_keys():
    config = config_from_dict(
        {
            "sources": [
                {
                    "type": "file",
                    "name": "x",
                    "glob": "/srv/*.csv",
                    "format": "csv",
                    "value": "v",
                    "time": "t",
                    "stream": "s",
                    "max_streams": 5,
                }
            ]
        }
    )
    (source,) = config.sources
    assert isinstance(source, SourceSettings) and source.max_streams == 5
    assert source.describe().startswith("x (file, csv)")
