"""The deploy/ files, each checked by the program that will read it wherever that program is on
this machine, and by parsing it otherwise.

* the systemd unit: ``systemd-analyze verify`` (systemd's own unit parser) and ``systemd-analyze
  security --offline`` (systemd's own exposure score), plus a configparser reading of the
  hardening settings the unit promises;
* deploy/site.toml: our own loader, ``limitwatch.config.load_config``;
* deploy/mosquitto.conf and deploy/mosquitto.acl: the real Mosquitto broker, started on a copy
  whose paths point into the test's folder, with a CA and server certificate made here (the
  ``cryptography`` package) and a password file made by Mosquitto's own ``mosquitto_passwd``;
  paho-mqtt clients then log in over TLS and exercise the ACL;
* all of them together: the real ``limitwatch serve`` on deploy/site.toml against that broker,
  and the Containerfile's HEALTHCHECK command run against the service's /health;
* the Containerfile and compose.yaml: parsed (no container engine on the CI machine).

References: systemd.exec(5), systemd.service(5) and systemd-analyze(1) (systemd 252);
mosquitto.conf(5) for Mosquitto 2.0; OASIS MQTT 5.0 (2019), sections 3.2.2.2 (CONNACK reason
codes: 0x86 bad user name or password, 0x87 not authorized), 3.4.2.1 (PUBACK reason code 0x87)
and 3.9.3 (SUBACK reason code 0x87); Dockerfile reference (HEALTHCHECK, USER); Compose
specification (services, volumes); logrotate(8).
"""

from __future__ import annotations

import configparser
import getpass
import inspect
import json
import re
import shlex
import shutil
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import click
import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.reasoncodes import ReasonCode

from limitwatch.alerts.outbox import OutboxWorker
from limitwatch.children import end_process
from limitwatch.cli import main as cli_main
from limitwatch.config import load_config
from limitwatch.durations import parse_duration
from limitwatch.metrics import Metrics, StatusServer
from tests.broker import free_port, mosquitto_path, wait_for_port
from tests.helpers import CLI
from tests.receivers import TestCA, make_ca
from tests.service_harness import ServiceProcess, count, wait_until

DEPLOY = Path(__file__).resolve().parents[1] / "deploy"
UNIT = DEPLOY / "limitwatch.service"
SITE = DEPLOY / "site.toml"

# MQTT 5.0 reason codes (OASIS MQTT 5.0, sections 3.2.2.2, 3.4.2.1 and 3.9.3)
BAD_USER_OR_PASSWORD = 0x86
NOT_AUTHORIZED = 0x87

# --------------------------------------------------------------------------- the systemd unit


def unit_sections() -> configparser.ConfigParser:
    """The unit read as INI. systemd allows repeated keys (strict=False keeps the last) and
    uses no %-interpolation of configparser's kind."""
    parser = configparser.ConfigParser(strict=False, interpolation=None)
    parser.optionxform = str  # type: ignore[assignment,method-assign]  # keys are case-sensitive
    parser.read(UNIT, encoding="utf-8")
    return parser


def test_unit_sets_the_promised_hardening():
    service = unit_sections()["Service"]
    expected = {
        "User": "limitwatch",
        "Group": "limitwatch",
        "NoNewPrivileges": "yes",
        "ProtectSystem": "strict",
        "ReadWritePaths": "/var/lib/limitwatch",
        "ProtectHome": "yes",
        "PrivateTmp": "yes",
        "PrivateDevices": "yes",
        "CapabilityBoundingSet": "",
        "SystemCallFilter": "@system-service",
        "Restart": "on-failure",
        "KillSignal": "SIGTERM",
        "StateDirectory": "limitwatch",
    }
    assert {key: service.get(key) for key in expected} == expected
    assert set(service["RestrictAddressFamilies"].split()) == {"AF_INET", "AF_INET6", "AF_UNIX"}
    assert parse_duration(service["RestartSec"]) > 0
    # the secrets file is optional: a leading "-" (systemd.exec(5), EnvironmentFile=)
    assert service["EnvironmentFile"].startswith("-/")


def test_unit_starts_limitwatch_serve_on_the_shipped_site_config():
    service = unit_sections()["Service"]
    argv = shlex.split(service["ExecStart"])
    assert Path(argv[0]).is_absolute() and Path(argv[0]).name == "limitwatch"
    assert argv[1:3] == ["serve", "--config"] and len(argv) == 4
    assert (DEPLOY / Path(argv[3]).name).is_file(), f"{argv[3]} is not shipped in deploy/"
    # and the CLI really has that command and option
    serve = cli_main.get_command(click.Context(cli_main), "serve")
    assert serve is not None
    assert any("--config" in p.opts for p in serve.params)
    # the one writable folder is where the site config keeps its database
    config = load_config(DEPLOY / Path(argv[3]).name)
    assert config.store.path.parent == Path(service["ReadWritePaths"])
    assert service["WorkingDirectory"] == service["ReadWritePaths"]


def test_unit_waits_long_enough_for_a_clean_stop():
    """TimeoutStopSec must cover what a SIGTERM sets off: the batch in hand (at most batch_wait
    of the site config, then its commit), the outbox worker's own stop timeout (a notification
    in flight), and the retained "offline" publish, which ingest/mqtt/client.py waits up to 5 s
    for."""
    service = unit_sections()["Service"]
    outbox_timeout = inspect.signature(OutboxWorker.stop).parameters["timeout"].default
    batch_wait = load_config(SITE).service.batch_wait
    offline_publish_wait = 5.0
    needed = outbox_timeout + batch_wait + offline_publish_wait
    assert parse_duration(service["TimeoutStopSec"]) > needed


def _systemd_analyze() -> str:
    exe = shutil.which("systemd-analyze")
    if exe is None:
        pytest.skip("systemd-analyze is not installed; the configparser checks above still ran")
    return exe


def _unit_copy(folder: Path) -> Path:
    """The unit with ExecStart's program swapped for this venv's limitwatch (verify checks that
    the program exists); every other line as shipped."""
    text = UNIT.read_text()
    shipped = shlex.split(unit_sections()["Service"]["ExecStart"])[0]
    assert text.count(shipped) == 1
    copy = folder / "limitwatch.service"
    copy.write_text(text.replace(shipped, str(CLI)))
    return copy


def test_systemd_analyze_verify_accepts_the_unit(tmp_path):
    exe = _systemd_analyze()
    copy = _unit_copy(tmp_path)
    done = subprocess.run(
        [exe, "verify", "--man=no", str(copy)], capture_output=True, text=True, timeout=60
    )
    # verify exits 0 even for an unknown key or a value it cannot parse ("..., ignoring"): it
    # only prints them, so any line about our unit is a failure.
    said = [
        line
        for line in (done.stdout + done.stderr).splitlines()
        if "limitwatch" in line or str(tmp_path) in line
    ]
    assert done.returncode == 0 and said == [], done.stdout + done.stderr


def test_systemd_rates_the_unit_well_hardened(tmp_path):
    exe = _systemd_analyze()
    copy = _unit_copy(tmp_path)
    # --threshold is in tenths of systemd's 0-10 exposure scale (10: no hardening at all); the
    # command fails when the unit is above it. 2.0 and below is what systemd calls "OK" or
    # better (systemd 252 wording, from memory of its rating table).
    done = subprocess.run(
        [exe, "security", "--offline=yes", "--threshold=20", "--no-pager", str(copy)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    if "--offline" in done.stderr and "unrecognized" in done.stderr:
        pytest.skip("this systemd-analyze has no --offline (systemd < 250)")
    exposure = re.search(r"Overall exposure level for \S+: ([\d.]+)", done.stdout)
    assert exposure is not None, done.stdout + done.stderr
    assert done.returncode == 0, f"exposure {exposure.group(1)}:\n{done.stdout}"


# --------------------------------------------------------------------------- the site config


def test_site_config_loads_through_our_loader_without_warnings():
    # load_config reads no secrets and opens no files but the TOML (check_files and
    # check_secrets do that at start-up), so the shipped file loads as it is.
    config = load_config(SITE)
    assert config.warnings() == []
    (source,) = config.sources
    assert source.tls is not None and source.tls.ca_file is not None
    assert source.password_file is not None and source.password_env is None
    assert config.store.path == Path("/var/lib/limitwatch/limitwatch.db")
    kinds = sorted(n["type"] for n in config.notifiers)
    assert kinds == ["console", "webhook"]
    (hook,) = (n for n in config.notifiers if n["type"] == "webhook")
    assert hook.get("secret_env") and not hook.get("secret_file")
    # every secret the site needs is named, none written inline (the loader refuses that)
    assert {r.env or str(r.file) for r in config.secret_refs()} == {
        "/etc/limitwatch/secrets/broker-password",
        "LIMITWATCH_WEBHOOK_SECRET",
    }
    # a gateway topic maps to the stream the [[streams]] entries expect
    assert config.stream_settings("pack-2/downtime").match == "pack-*/downtime"


# --------------------------------------------------------------------------- the broker


def rewritten(text: str, prefixes: dict[str, str], lines: dict[str, str]) -> str:
    """``text`` with path prefixes replaced everywhere and whole option lines replaced; each
    must be present, so the test notices when the sample changes under it."""
    for old, new in prefixes.items():
        assert old in text, f"the sample no longer mentions {old!r}"
        text = text.replace(old, new)
    for old, new in lines.items():
        text, n = re.subn(rf"^{re.escape(old)}$", new, text, flags=re.MULTILINE)
        assert n == 1, f"expected exactly one line {old!r} in the sample, found {n}"
    return text


USERS = {"limitwatch": "lw-pass-1", "quillmoor-gateway": "gw-pass-2", "operations": "ops-pass-3"}


@dataclass
class DeployedBroker:
    port: int
    ca: TestCA
    log: Path
    process: subprocess.Popen[bytes]


@pytest.fixture(scope="module")
def deployed_broker(tmp_path_factory: pytest.TempPathFactory) -> Iterator[DeployedBroker]:
    """Mosquitto on deploy/mosquitto.conf and deploy/mosquitto.acl, as shipped except for: the
    paths (into this test's folder), the port (a free one, on 127.0.0.1 only) and the user to
    drop to (the current one, which can write the test's folder)."""
    exe = mosquitto_path()
    if exe is None or shutil.which("mosquitto_passwd") is None:
        pytest.skip("mosquitto (and mosquitto_passwd) are not installed")
    root = tmp_path_factory.mktemp("mosquitto")
    etc, data = root / "etc", root / "data"
    for folder in (etc / "certs", etc / "ca_certificates", data):
        folder.mkdir(parents=True)
    ca = make_ca(root / "ca", common_name="Quillmoor Works Test CA")
    shutil.copy(ca.cert_path, etc / "ca_certificates" / "quillmoor-ca.pem")
    ca.server_files(etc / "certs", "broker")
    shutil.copy(DEPLOY / "mosquitto.acl", etc / "acl")
    passwd = etc / "passwd"
    for i, (user, password) in enumerate(USERS.items()):
        create = ["-c"] if i == 0 else []
        subprocess.run(
            ["mosquitto_passwd", *create, "-b", str(passwd), user, password],
            check=True,
            capture_output=True,
            timeout=30,
        )
    port = free_port()
    text = rewritten(
        (DEPLOY / "mosquitto.conf").read_text(),
        prefixes={"/etc/mosquitto/": f"{etc}/", "/var/lib/mosquitto/": f"{data}/"},
        lines={
            "listener 8883": f"listener {port} 127.0.0.1",
            "user mosquitto": "user " + getpass.getuser(),
        },
    )
    config = root / "mosquitto.conf"
    config.write_text(text)
    log = root / "mosquitto.log"
    with log.open("wb") as out:
        process = subprocess.Popen([exe, "-c", str(config)], stdout=out, stderr=out)
    try:
        deadline = time.monotonic() + 15
        while True:
            if process.poll() is not None:  # it read the config and gave up
                pytest.fail(f"mosquitto refused deploy/mosquitto.conf:\n{log.read_text()}")
            try:
                wait_for_port(port, timeout=0.5)
                break
            except TimeoutError:
                if time.monotonic() > deadline:
                    pytest.fail(f"mosquitto did not listen on {port}:\n{log.read_text()}")
        # it says "... running" just after opening its listeners
        wait_until(lambda: " running" in log.read_text(), timeout=10, what="mosquitto running")
        yield DeployedBroker(port, ca, log, process)
    finally:
        end_process(process)


class Client:
    """One paho-mqtt 2.x client (MQTT 5, TLS with the test CA) that records what the broker
    answers: CONNACK, each PUBACK and SUBACK reason code, and the messages it receives."""

    def __init__(self, broker: DeployedBroker, user: str | None, password: str | None) -> None:
        self.broker = broker
        self._lock = threading.Condition()
        self.connack: ReasonCode | None = None
        self.acks: dict[int, list[ReasonCode]] = {}
        self.messages: list[tuple[str, bytes, bool]] = []
        c = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2,
            client_id=f"deploy-test-{user}-{time.monotonic_ns()}",
            protocol=mqtt.MQTTv5,
        )
        c.tls_set(ca_certs=str(broker.ca.cert_path))
        if user is not None:
            c.username_pw_set(user, password)
        c.on_connect = self._on_connect
        c.on_publish = lambda _c, _u, mid, rc, _p: self._ack(mid, [rc])
        c.on_subscribe = lambda _c, _u, mid, rcs, _p: self._ack(mid, list(rcs))
        c.on_message = self._on_message
        self.client = c

    def _on_connect(self, _c, _u, _flags, reason_code, _props) -> None:
        with self._lock:
            if self.connack is None:
                self.connack = reason_code
            self._lock.notify_all()

    def _ack(self, mid: int, codes: list[ReasonCode]) -> None:
        with self._lock:
            self.acks[mid] = codes
            self._lock.notify_all()

    def _on_message(self, _c, _u, msg: mqtt.MQTTMessage) -> None:
        with self._lock:
            self.messages.append((msg.topic, msg.payload, bool(msg.retain)))
            self._lock.notify_all()

    def _wait(self, ready: Callable[[], Any], what: str, timeout: float = 10.0) -> Any:
        with self._lock:
            if not self._lock.wait_for(ready, timeout=timeout):
                raise TimeoutError(f"no {what} within {timeout} s")
            return ready()

    def connect(self) -> ReasonCode:
        # "localhost": the name the site config dials and the test certificate carries
        self.client.connect("localhost", self.broker.port, keepalive=10)
        self.client.loop_start()
        return self._wait(lambda: self.connack, "CONNACK")

    def publish(self, topic: str, payload: str) -> ReasonCode:
        """QoS 1; the PUBACK's reason code (below 0x80 is success, e.g. 0x10 "no matching
        subscribers")."""
        info = self.client.publish(topic, payload, qos=1)
        return self._wait(lambda: self.acks.get(info.mid), "PUBACK")[0]

    def subscribe(self, topic_filter: str) -> int:
        _, mid = self.client.subscribe(topic_filter, qos=1)
        return self._wait(lambda: self.acks.get(mid), "SUBACK")[0].value

    def wait_for_message(self, payload: bytes, timeout: float = 10.0) -> tuple[str, bytes, bool]:
        def found():
            return next((m for m in self.messages if m[1] == payload), None)

        return self._wait(found, f"message {payload!r}", timeout)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


@pytest.fixture
def clients(deployed_broker: DeployedBroker) -> Iterator[Callable[..., Client]]:
    made: list[Client] = []

    def make(user: str | None, password: str | None = None) -> Client:
        client = Client(
            deployed_broker, user, password if password is not None else USERS.get(user or "")
        )
        made.append(client)
        return client

    yield make
    for client in made:
        client.close()


def test_mosquitto_starts_on_the_sample_without_complaint(deployed_broker):
    assert deployed_broker.process.poll() is None
    log = deployed_broker.log.read_text()
    # start-up is everything up to "mosquitto version ... running"; after it come the tests'
    # own connections (the port probe, the refused logins)
    lines = log.splitlines()
    running = next((i for i, line in enumerate(lines) if line.endswith(" running")), None)
    assert running is not None, log
    complaints = [
        line
        for line in lines[:running]
        if re.search(r"\b(error|warning)\b", line, re.I)
        # our rewrite, not the sample: the copy stays the current user, root in some CI jobs
        and not (getpass.getuser() == "root" and "should not be run as root" in line)
    ]
    assert complaints == [], log


def test_broker_takes_the_right_password_over_tls_and_refuses_others(deployed_broker, clients):
    assert clients("limitwatch").connect().value == 0
    wrong = clients("limitwatch", "not-the-password").connect()
    assert wrong.is_failure and wrong.value in (BAD_USER_OR_PASSWORD, NOT_AUTHORIZED)
    stranger = clients("nobody-here", "whatever").connect()
    assert stranger.is_failure and stranger.value in (BAD_USER_OR_PASSWORD, NOT_AUTHORIZED)
    anonymous = clients(None).connect()  # allow_anonymous false
    assert anonymous.is_failure and anonymous.value in (BAD_USER_OR_PASSWORD, NOT_AUTHORIZED)


def test_broker_speaks_only_tls_on_the_listener(deployed_broker):
    """A plain-text MQTT CONNECT (right password) to the TLS listener: the broker reads it as a
    broken TLS handshake and drops the connection, so no session ever starts."""
    plain = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="deploy-test-plain")
    plain.username_pw_set("limitwatch", USERS["limitwatch"])
    connacks: list[ReasonCode] = []
    plain.on_connect = lambda _c, _u, _f, rc, _p: connacks.append(rc)
    plain.connect("127.0.0.1", deployed_broker.port, keepalive=5)
    try:
        results = []
        for _ in range(50):
            results.append(plain.loop(timeout=0.1))
            if results[-1] != mqtt.MQTT_ERR_SUCCESS:
                break
    finally:
        plain.disconnect()
    assert results[-1] != mqtt.MQTT_ERR_SUCCESS, "the plain connection stayed open"
    assert connacks == []


def test_acl_lets_limitwatch_read_readings_and_write_only_its_status(deployed_broker, clients):
    site = load_config(SITE).sources[0]
    (topic,) = site.topics
    reader = clients("limitwatch")
    gateway = clients("quillmoor-gateway")
    assert reader.connect().value == 0 and gateway.connect().value == 0
    # limitwatch subscribes to the filter the site config uses, granted at QoS 1
    assert reader.subscribe(topic.filter) == 1
    # Mosquitto 2.0 accepts the gateway's subscription too, but checks read access on every
    # message it would deliver (mosquitto.conf(5), acl_file), so the gateway gets nothing
    gateway.subscribe(topic.filter)
    reading = json.dumps({"value": 12.5, "ts": "2030-03-04T06:00:00Z", "seq": 1})
    assert not gateway.publish("quillmoor/readings/pack-2/downtime", reading).is_failure
    got_topic, _, _ = reader.wait_for_message(reading.encode())
    assert got_topic == "quillmoor/readings/pack-2/downtime"
    time.sleep(0.5)  # the broker sends to every subscriber in one pass; give it a moment
    assert gateway.messages == []
    # limitwatch writes its status topic, and nothing else
    assert not reader.publish(site.status_topic, "online").is_failure
    assert reader.publish("quillmoor/readings/pack-2/downtime", "1.0").value == NOT_AUTHORIZED
    assert reader.publish("limitwatch/some-other/status", "online").value == NOT_AUTHORIZED
    assert gateway.publish(site.status_topic, "offline").value == NOT_AUTHORIZED


# --------------------------------------------------------------------------- all together


def site_copy(folder: Path, broker: DeployedBroker, metrics_port: int) -> Path:
    """deploy/site.toml with /etc/limitwatch and /var/lib/limitwatch moved into ``folder``, the
    broker's test port and a free metrics port; everything else as shipped."""
    etc, data = folder / "etc", folder / "data"
    (etc / "secrets").mkdir(parents=True)
    data.mkdir()
    shutil.copy(broker.ca.cert_path, etc / "quillmoor-ca.pem")
    secret = etc / "secrets" / "broker-password"
    secret.write_text(USERS["limitwatch"] + "\n")
    secret.chmod(0o400)
    text = rewritten(
        SITE.read_text(),
        prefixes={"/etc/limitwatch/": f"{etc}/", "/var/lib/limitwatch/": f"{data}/"},
        lines={
            "port = 8883": f"port = {broker.port}",
            'metrics_listen = "127.0.0.1:9464"': f'metrics_listen = "127.0.0.1:{metrics_port}"',
        },
    )
    path = etc / "site.toml"
    path.write_text(text)
    return path


def healthcheck_argv(port: int) -> list[str]:
    """The Containerfile's HEALTHCHECK command (exec form), aimed at ``port``, run by this
    Python."""
    (line,) = [i for i in containerfile_instructions() if i.startswith("HEALTHCHECK ")]
    argv = json.loads(line.split(" CMD ", 1)[1])
    assert argv[0] == "python" and "127.0.0.1:9464/health" in argv[-1]
    return [sys.executable, *argv[1:-1], argv[-1].replace("127.0.0.1:9464", f"127.0.0.1:{port}")]


def test_limitwatch_serve_runs_on_the_site_config_against_the_sample_broker(
    deployed_broker, clients, tmp_path
):
    metrics_port = free_port()
    config = site_copy(tmp_path, deployed_broker, metrics_port)
    db = tmp_path / "data" / "limitwatch.db"
    status_topic = load_config(config).sources[0].status_topic
    watcher = clients("operations")
    gateway = clients("quillmoor-gateway")
    assert watcher.connect().value == 0 and gateway.connect().value == 0
    assert watcher.subscribe(status_topic) == 1
    svc = ServiceProcess(config, env={"LIMITWATCH_WEBHOOK_SECRET": "test-signing-secret"}).start()
    try:
        # its retained "online" (the ACL lets it write the status topic, operations read it)
        watcher.wait_for_message(b"online", timeout=30)
        now = time.time()
        for i in range(3):
            reading = {"value": 10.0 + i, "ts": now - 3600 * (3 - i), "seq": i + 1}
            sent = gateway.publish("quillmoor/readings/pack-2/downtime", json.dumps(reading))
            assert not sent.is_failure
        wait_until(lambda: count(db, "readings") == 3, what="3 readings committed", timeout=30)
        # the container's health check passes against the live service
        done = subprocess.run(healthcheck_argv(metrics_port), capture_output=True, timeout=30)
        assert done.returncode == 0, done.stderr
    finally:
        code = svc.stop()
    assert code == 0, svc.logs()
    watcher.wait_for_message(b"offline", timeout=10)
    # no answer from /health (the service is gone): the health check fails
    done = subprocess.run(healthcheck_argv(metrics_port), capture_output=True, timeout=30)
    assert done.returncode != 0


# --------------------------------------------------------------------------- container files


def containerfile_instructions() -> list[str]:
    """Instructions with continuation lines joined and comments dropped."""
    joined: list[str] = []
    pending = ""
    for raw in (DEPLOY / "Containerfile").read_text().splitlines():
        line = raw.strip()
        if not pending and (not line or line.startswith("#")):
            continue
        if line.endswith("\\"):
            pending += line[:-1].strip() + " "
            continue
        joined.append(pending + line)
        pending = ""
    assert not pending, "a continuation line runs off the end of the Containerfile"
    return joined


def test_containerfile_runs_as_a_non_root_user_with_a_health_check():
    instructions = containerfile_instructions()
    words = [i.split(None, 1) for i in instructions]
    keywords = [w[0].upper() for w in words]
    assert words[0] == ["FROM", "python:3.11-slim"]
    users = [w[1] for w in words if w[0].upper() == "USER"]
    assert users, "no USER instruction: the container would run as root"
    user = users[-1].split(":")[0]
    assert user not in ("root", "0")
    assert keywords.index("ENTRYPOINT") > max(i for i, k in enumerate(keywords) if k == "USER")
    assert keywords.count("HEALTHCHECK") == 1
    volume = next(w[1] for w in words if w[0].upper() == "VOLUME")
    assert json.loads(volume) == ["/var/lib/limitwatch"]
    entry = json.loads(next(w[1] for w in words if w[0].upper() == "ENTRYPOINT"))
    assert entry[:3] == ["limitwatch", "serve", "--config"]
    assert (DEPLOY / Path(entry[3]).name).is_file()
    # the health check asks the port the site config listens on
    port = load_config(SITE).service.metrics_address[1]  # type: ignore[index]
    assert f"127.0.0.1:{port}/health" in next(
        i for i in instructions if i.startswith("HEALTHCHECK")
    )


def test_health_check_command_fails_on_a_degraded_service():
    """The HEALTHCHECK command against the real status listener answering 503."""
    server = StatusServer(
        f"127.0.0.1:{free_port()}", Metrics(), lambda: {"status": "degraded", "sources": {}}
    )
    server.start()
    try:
        done = subprocess.run(healthcheck_argv(server.address[1]), capture_output=True, timeout=30)
    finally:
        server.close()
    assert done.returncode != 0
    assert b"503" in done.stderr


def test_compose_file_mounts_only_shipped_or_local_files():
    text = (DEPLOY / "compose.yaml").read_text()
    for source in re.findall(r"^\s*- (\./[^:\s]+):", text, flags=re.MULTILINE):
        # files from this folder must exist; ./local/ is the site's own (secrets, certificates)
        if not source.startswith("./local/"):
            assert (DEPLOY / source).is_file(), f"compose mounts {source}, which is not shipped"


def test_compose_file_is_valid_yaml_with_both_services():
    yaml = pytest.importorskip("yaml", reason="PyYAML is not installed (not a dependency)")
    data = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    assert set(data["services"]) == {"limitwatch", "mosquitto"}
    lw = data["services"]["limitwatch"]
    assert lw["build"]["dockerfile"] == "deploy/Containerfile"
    assert any(v.endswith(":/var/lib/limitwatch") for v in lw["volumes"])
    assert set(data["volumes"]) >= {"limitwatch-data", "mosquitto-data"}


# --------------------------------------------------------------------------- log rotation


def test_logrotate_accepts_the_sample(tmp_path):
    exe = shutil.which("logrotate") or (
        "/usr/sbin/logrotate" if Path("/usr/sbin/logrotate").exists() else None
    )
    if exe is None:
        pytest.skip("logrotate is not installed (only needed when logs go to files)")
    logs = tmp_path / "log"
    logs.mkdir()
    (logs / "limitwatch.log").write_text("a line\n")
    conf = tmp_path / "limitwatch"
    conf.write_text(
        rewritten((DEPLOY / "logrotate.conf").read_text(), {"/var/log/limitwatch/": f"{logs}/"}, {})
    )
    done = subprocess.run(
        [exe, "--debug", "--state", str(tmp_path / "state"), str(conf)],
        capture_output=True,
        text=True,
        timeout=30,
    )
    assert done.returncode == 0 and "error" not in done.stderr.lower(), done.stderr
