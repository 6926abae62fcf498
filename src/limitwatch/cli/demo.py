"""``limitwatch demo``: the invented Quillmoor Works scenario through the real service path.

The demo writes a config and a controller-style CSV export into one folder, starts the same
:class:`~limitwatch.service.Service` that ``limitwatch serve`` runs (file source, SQLite, console
notifier), and appends the plant's readings to the export a slice at a time so alerts arrive live.
With ``--mqtt`` it starts a private Mosquitto on a free loopback port and publishes the readings
with QoS 1 instead; with ``--sparkplug`` the plant's site gateway publishes them on that broker
as a Sparkplug B edge node (:mod:`limitwatch.demo_sparkplug`) and the service reads them as a
Sparkplug host application.
"""

from __future__ import annotations

import json
import shlex
import shutil
import sqlite3
import sys
import threading
import time
from collections.abc import Callable
from functools import partial
from importlib import resources
from pathlib import Path

import click

from limitwatch import SAFETY_CAUTION, demo_folder, demo_sparkplug
from limitwatch.config import Config, load_config
from limitwatch.demo import LEARN, PLANT, STREAMS, generate
from limitwatch.ingest.timeparse import format_time
from limitwatch.localbroker import mosquitto_path, private_broker

DEMO_SEED = 3
"""A seed whose quiet stretches happen to raise no false alarm, so the story stays readable.
Real streams do raise some: `limitwatch plan` estimates how many for a rule set and cadence."""

SLICES = 12


def demo_config_text() -> str:
    """The packaged demo config (identical to config/demo.toml in the source tree)."""
    return resources.files("limitwatch").joinpath("demo.toml").read_text(encoding="utf-8")


def _with_source(source: str) -> str:
    """The demo config with its file source replaced by ``source``."""
    text = demo_config_text()
    start = text.index("[[sources]]")
    end = text.index("[[notifiers]]")
    return text[:start] + source + text[end:]


def _mqtt_source(port: int) -> str:
    return f"""[[sources]]
type = "mqtt"
name = "quillmoor-gateway"
host = "127.0.0.1"
port = {port}
client_id = "limitwatch-demo"
session_expiry = "1h"

[[sources.topics]]
filter = "quillmoor/+/+"
stream = "{{2}}/{{3}}"
payload = "json"
value = "value"
time = "time"
time_format = "epoch_s"

"""


@click.command("demo")
@click.option(
    "--folder",
    type=click.Path(file_okay=False),
    default="limitwatch-demo",
    show_default=True,
    help="Where the demo writes its config, data and database: a new or empty folder, or one "
    "an earlier demo made (its files are then replaced; nothing else there is touched).",
)
@click.option(
    "--mqtt", "use_mqtt", is_flag=True, help="Feed the readings over a private Mosquitto."
)
@click.option(
    "--sparkplug",
    "use_sparkplug",
    is_flag=True,
    help="Feed the readings as a Sparkplug B edge node (births, data by alias, a device "
    "death) over a private Mosquitto.",
)
@click.option(
    "--pace",
    type=click.FloatRange(0, 5),
    default=0.4,
    show_default=True,
    help="Seconds between slices of readings (0: as fast as possible).",
)
def demo_cmd(folder: str, use_mqtt: bool, use_sparkplug: bool, pace: float) -> None:
    """Run an invented plant through the real service and watch alerts arrive.

    Quillmoor Works (it does not exist) has three packaging lines reporting downtime per shift,
    a compressor reporting its discharge temperature each minute, and an oven reporting energy
    per batch. Each stream learns a baseline from its quiet stretch; then a sustained shift,
    a slow drift, one wild reading and a sensor that stops reporting are injected.

    \b
    Example:
      limitwatch demo
      limitwatch demo --mqtt --folder /tmp/quillmoor
      limitwatch demo --sparkplug
    """
    if use_mqtt and use_sparkplug:
        raise click.UsageError("choose one of --mqtt and --sparkplug")
    transport = "mqtt" if use_mqtt else "sparkplug" if use_sparkplug else "file"
    if transport != "file" and mosquitto_path() is None:
        raise click.ClickException(
            f"--{transport} needs Mosquitto on this machine, and none was found on PATH or "
            "at /usr/sbin/mosquitto (Debian/Ubuntu: apt-get install mosquitto); plain "
            "`limitwatch demo` needs no broker"
        )
    root = Path(folder).resolve()
    try:
        replaced = demo_folder.prepare(root, demo_config_text())
    except demo_folder.DemoFolderError as exc:
        raise click.ClickException(str(exc)) from None
    if replaced is not None:
        click.echo(replaced.describe(root))
    if transport == "file":
        (root / "demo.toml").write_text(demo_config_text())
        run_demo(root, transport=transport, pace=pace, echo=click.echo)
        return
    source = _mqtt_source if transport == "mqtt" else demo_sparkplug.source_config
    try:
        with private_broker(root / "broker", queued=100_000) as port:
            (root / "demo.toml").write_text(_with_source(source(port)))
            run_demo(root, transport=transport, pace=pace, echo=click.echo)
    except RuntimeError as exc:  # the broker would not start
        raise click.ClickException(str(exc)) from None


Feed = Callable[[list[tuple[str, float, float]]], None]


def run_demo(root: Path, *, transport: str, pace: float, echo: Callable[[str], None]) -> None:
    from limitwatch.service import Job, Service

    config = load_config(root / "demo.toml")
    now = time.time()
    rows = sorted(generate(seed=DEMO_SEED, end=now), key=lambda r: (r[1], r[0]))
    echo(f"{PLANT} (an invented plant) -- {len(rows)} readings from {len(STREAMS)} streams")
    for spec in STREAMS:
        cause = spec.injected or "nothing injected"
        echo(f"  {spec.stream:24} {spec.description} ({spec.unit}); then: {cause}")
    echo(f"Each stream learns its baseline from its first {LEARN} readings.")
    echo(f"Caution: {SAFETY_CAUTION}")
    echo("")

    # The service's store connection belongs to the thread that opens it, so the worker
    # thread starts, runs and closes the service, exactly as `limitwatch serve` does in its one.
    service = Service(config)
    ready = threading.Event()
    failure: list[BaseException] = []

    def work() -> None:
        try:
            service.start()
            ready.set()
            service.run()
        except BaseException as exc:  # reported below, in the demo's own thread
            failure.append(exc)
        finally:
            ready.set()
            service.close()

    worker = threading.Thread(target=work, name="demo-worker", daemon=True)
    worker.start()
    ready.wait(timeout=30)
    store_path = config.store.file
    assert store_path is not None  # the demo's own config names an SQLite file

    def alive() -> bool:
        if failure or not worker.is_alive():
            raise click.ClickException(
                f"the demo's service stopped: {failure[0] if failure else '?'}"
            )
        return True

    closing: list[Callable[[], None]] = []
    try:
        if transport != "file":
            # connect_async returns at once; readings published before the subscription exists
            # would be dropped by the broker (no session yet), so wait for it.
            _wait_for(
                lambda: alive() and all(s.health().ready for s in service.sources.values()),
                20,
                "the demo's service to subscribe on the private broker",
            )
        feed = _feeder(transport, root, config, rows, echo, closing)
        size = max(1, len(rows) // SLICES)
        for start in range(0, len(rows), size):
            chunk = rows[start : start + size]
            feed(chunk)
            if transport == "file":
                service.intake.put(Job("poll-files", "quillmoor-export"))
            fed = start + len(chunk)
            _wait_for(partial(_fed, alive, store_path, fed), 20, f"{fed} readings stored")
            echo(
                f"-- fed {min(start + size, len(rows))}/{len(rows)} readings, "
                f"up to {format_time(chunk[-1][1])}"
            )
            time.sleep(pace)
        service.intake.put(Job("stale-check"))
        _wait_for(lambda: alive() and _stale_alerts(store_path) > 0, 10, "the stale check")
        time.sleep(max(pace, 1.0))  # let the console notifier print the last alerts
    finally:
        for close in closing:
            close()
        service.request_stop()
        worker.join(timeout=30)
    _summary(root, store_path, echo)


def _feeder(
    transport: str,
    root: Path,
    config: Config,
    rows: list[tuple[str, float, float]],
    echo: Callable[[str], None],
    closing: list[Callable[[], None]],
) -> Feed:
    """How the readings reach the service; what must be closed afterwards joins ``closing``."""
    if transport == "file":
        return _file_feeder(root)
    if transport == "mqtt":
        return _mqtt_feeder(config, closing)
    gateway = demo_sparkplug.PlantGateway(_broker_port(config), rows)
    gateway.start()
    closing.append(gateway.close)
    echo(f"-- {gateway.describe()}")
    return gateway.feed


def _fed(alive: Callable[[], bool], store_path: Path, count: int) -> bool:
    return alive() and _stored(store_path) >= count


def _file_feeder(root: Path) -> Feed:
    export = root / "data" / "plant.csv"
    export.write_text("time,stream,value\n")

    def feed(chunk: list[tuple[str, float, float]]) -> None:
        with export.open("a", encoding="utf-8") as handle:
            for stream, moment, value in chunk:
                handle.write(f"{format_time(moment)},{stream},{value:.2f}\n")

    return feed


def _broker_port(config: Config) -> int:
    """The private broker's port, as the demo wrote it into its config's one source."""
    port = getattr(config.sources[0], "port", None)
    assert isinstance(port, int), "the demo's broker config has a port"
    return port


def _mqtt_feeder(config: Config, closing: list[Callable[[], None]]) -> Feed:
    import paho.mqtt.client as mqtt

    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="quillmoor-gateway-sim")
    client.connect("127.0.0.1", _broker_port(config))
    client.loop_start()

    def close() -> None:
        client.loop_stop()
        client.disconnect()

    closing.append(close)

    def feed(chunk: list[tuple[str, float, float]]) -> None:
        infos = [
            client.publish(
                f"quillmoor/{stream}", json.dumps({"value": value, "time": moment}), qos=1
            )
            for stream, moment, value in chunk
        ]
        for info in infos:
            info.wait_for_publish(timeout=10)

    return feed


def _stored(db: Path) -> int:

    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
    try:
        return int(conn.execute("SELECT count(*) FROM readings").fetchone()[0])
    except sqlite3.OperationalError:
        return 0
    finally:
        conn.close()


def _stale_alerts(db: Path) -> int:

    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
    try:
        return int(
            conn.execute("SELECT count(*) FROM incident_rules WHERE rule = 'stale'").fetchone()[0]
        )
    finally:
        conn.close()


def command_prefix(
    argv0: str, *, which: Callable[[str], str | None] = shutil.which, python: str = sys.executable
) -> str:
    """How to run limitwatch again from the user's shell, as this process was run.

    The README installs into a virtual environment without activating it, so a bare
    ``limitwatch`` is often not on PATH: name the script by its path unless PATH finds the same
    file, and fall back to ``python -m limitwatch`` with this interpreter's path.
    """
    script = Path(argv0) if Path(argv0).name.startswith("limitwatch") else None
    if script is None or not script.is_file():
        beside = Path(python).with_name("limitwatch")
        script = beside if beside.is_file() else None
    if script is None:
        return f"{shlex.quote(python)} -m limitwatch"
    found = which("limitwatch")
    if found is not None and Path(found).resolve() == script.resolve():
        return "limitwatch"
    return shlex.quote(str(script.absolute()))


def _wait_for(check: Callable[[], bool], timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if check():
            return
        time.sleep(0.05)
    raise click.ClickException(f"the demo gave up after {timeout:g} s waiting for {what}")


def _summary(root: Path, db: Path, echo: Callable[[str], None]) -> None:

    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        incidents = conn.execute("SELECT id, stream FROM alerts ORDER BY stream, id").fetchall()
        rules = conn.execute(
            "SELECT alert_id, rule FROM incident_rules ORDER BY alert_id, first_time, rule"
        ).fetchall()
    finally:
        conn.close()
    by_incident: dict[int, list[str]] = {}
    for alert_id, rule in rules:
        by_incident.setdefault(alert_id, []).append(rule)
    echo("")
    echo(f"{len(incidents)} incident(s), one per cause; the rules that joined each:")
    for alert_id, stream in incidents:
        echo(f"  {stream:24} incident {alert_id}: {', '.join(by_incident.get(alert_id, []))}")
    quiet = sorted({s.stream for s in STREAMS} - {r[1] for r in incidents})
    for stream in quiet:
        echo(f"  {stream:24} no incident (common-cause noise only)")
    db_opt = f"--db {shlex.quote(str(db))}"
    exe = command_prefix(sys.argv[0] if sys.argv else "")
    echo("")
    echo(f"Everything is in {root}")
    echo("Next, try:")
    echo(f"  {exe} alerts {db_opt}")
    echo(f"  {exe} ack 1 --note 'checked the sealing jaw' {db_opt}")
    echo(f"  {exe} log 1 {db_opt}")
    echo(f"  {exe} streams {db_opt}")
    echo(f"  {exe} chart pack-2/downtime -o {shlex.quote(str(root / 'pack-2.png'))} {db_opt}")
    echo(f"  {exe} report --out {shlex.quote(str(root / 'report'))} {db_opt}")
