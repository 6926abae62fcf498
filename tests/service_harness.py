"""Running `limitwatch serve` as a real process, and reading what it committed."""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import time
from collections.abc import Callable
from pathlib import Path

import paho.mqtt.client as mqtt

from tests.helpers import CLI


def wait_until(
    check: Callable[[], object], timeout: float = 30.0, what: str = "condition"
) -> object:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = check()
        if value:
            return value
        time.sleep(0.05)
    raise TimeoutError(f"timed out after {timeout} s waiting for {what}")


class ServiceProcess:
    """`limitwatch serve --config FILE` in its own process, logs to a file beside the config."""

    def __init__(self, config: Path, env: dict[str, str] | None = None) -> None:
        self.config = config
        self.log = config.with_suffix(".log")
        self.out = config.with_suffix(".out")
        self.env = {**os.environ, **(env or {})}
        self.process: subprocess.Popen[bytes] | None = None

    def start(self, own_group: bool = False) -> ServiceProcess:
        """``own_group``: lead a process group of its own, as a systemd unit or a terminal's
        foreground job does, so that :meth:`stop_group` can signal every process in it."""
        with self.log.open("ab") as log, self.out.open("ab") as out:
            self.process = subprocess.Popen(
                [str(CLI), "serve", "--config", str(self.config), "--log-level", "info"],
                stdout=out,
                stderr=log,
                env=self.env,
                start_new_session=own_group,
            )
        return self

    def stop_group(self, sig: int = signal.SIGTERM) -> int:
        """Signal the whole process group, as ``systemctl stop`` or Ctrl-C does."""
        assert self.process is not None
        os.killpg(self.process.pid, sig)
        return self.process.wait(timeout=60)

    def kill(self) -> None:
        assert self.process is not None
        self.process.send_signal(signal.SIGKILL)
        self.process.wait(timeout=30)

    def stop(self) -> int:
        assert self.process is not None
        self.process.send_signal(signal.SIGTERM)
        return self.process.wait(timeout=60)

    def alive(self) -> bool:
        return self.process is not None and self.process.poll() is None

    def logs(self) -> str:
        return self.log.read_text(errors="replace") if self.log.exists() else ""

    def children(self) -> list[int]:
        """Process ids of the service's MQTT connection processes."""
        assert self.process is not None
        found: list[int] = []
        for task in Path(f"/proc/{self.process.pid}/task").glob("*/children"):
            for pid in task.read_text().split():
                try:
                    cmdline = Path(f"/proc/{pid}/cmdline").read_bytes()
                except FileNotFoundError:
                    continue
                if b"limitwatch.ingest.mqtt.process" in cmdline:
                    found.append(int(pid))
        return found


def process_gone(pid: int) -> bool:
    """True once ``pid`` has exited (a zombie waiting to be reaped counts as exited)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return True
    return stat.rsplit(")", 1)[1].split()[0] in {"Z", "X"}


def query(db: Path, sql: str, params: tuple = ()) -> list[tuple]:
    """Read the service's database the way an operator's tool would, read-only, while it runs."""
    if not db.exists():
        return []
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10)
    try:
        return conn.execute(sql, params).fetchall()
    except sqlite3.OperationalError:
        return []  # the schema is not there yet
    finally:
        conn.close()


def count(db: Path, table: str, where: str = "1=1", params: tuple = ()) -> int:
    rows = query(db, f"SELECT count(*) FROM {table} WHERE {where}", params)
    return int(rows[0][0]) if rows else 0


def checkpoints(db: Path) -> dict[str, dict]:
    return {s: json.loads(j) for s, j in query(db, "SELECT stream, state_json FROM checkpoints")}


class Publisher:
    """A paho-mqtt publisher (QoS 1) for the tests' readings."""

    def __init__(self, port: int, client_id: str = "test-publisher") -> None:
        self.client = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv5
        )
        self.client.max_inflight_messages_set(200)
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()

    def send(self, topic: str, payload: str | bytes, qos: int = 1) -> mqtt.MQTTMessageInfo:
        return self.client.publish(topic, payload, qos=qos)

    def send_all(
        self, messages: list[tuple[str, str]], pause_every: int = 0, pause_s: float = 0.0
    ) -> None:
        infos = []
        for i, (topic, payload) in enumerate(messages, start=1):
            infos.append(self.send(topic, payload))
            if pause_every and i % pause_every == 0:
                time.sleep(pause_s)
        for info in infos:
            info.wait_for_publish(timeout=60)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def mqtt_config(
    folder: Path,
    port: int,
    *,
    webhook_url: str | None = None,
    learn_count: int = 20,
    rules: str = "western-electric",
    batch_max: int = 200,
    tls_ca: Path | None = None,
    protocol: str = "5",
    extra: str = "",
) -> Path:
    """A config with one MQTT source: topic plant/<line>/<sensor>/reading, JSON payloads with
    value, epoch-second time and a sequence number."""
    notifier = (
        f'[[notifiers]]\nname = "ops-hook"\ntype = "webhook"\nurl = "{webhook_url}"\n'
        "connect_timeout_s = 2\nread_timeout_s = 5\n"
        if webhook_url
        else '[[notifiers]]\nname = "terminal"\ntype = "console"\n'
    )
    tls = f'\n[sources.tls]\nca_file = "{tls_ca}"\n' if tls_ca else ""
    text = f"""
[store]
path = "{folder / "service.db"}"

[service]
batch_max = {batch_max}
batch_wait = "50ms"
alert_tick_every = "1s"

[defaults]
rules = "{rules}"
learn_count = {learn_count}

[alerts]
clear_after = 10
repeat_every = "off"

[[sources]]
type = "mqtt"
name = "gateway"
host = "{"localhost" if tls_ca else "127.0.0.1"}"
port = {port}
protocol = "{protocol}"
client_id = "limitwatch-test"
session_expiry = "1h"
reconnect_min_s = 1
reconnect_max_s = 2
{tls}
[[sources.topics]]
filter = "plant/+/+/reading"
stream = "{{2}}/{{3}}"
payload = "json"
value = "v"
time = "t"
time_format = "epoch_s"
seq = "seq"

{notifier}
{extra}
"""
    path = folder / "service.toml"
    path.write_text(text)
    return path
